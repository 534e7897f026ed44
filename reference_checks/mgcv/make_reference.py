"""Compute mgcv's REML results for the problems of reference_checks/mgcv_problems.py, once.

Writes reference_checks/mgcv/mgcv_reference.json, which reference_checks/test_mgcv_reference.py
reads (the tests do not need R). Needs R with mgcv (Debian: ``apt-get install r-cran-mgcv``)::

    PYTHONPATH=$PWD python reference_checks/mgcv/make_reference.py

For every problem the dense constrained design ``X Z`` (intercept column first), the padded
penalties, the offset and the counts go to fit_mgcv.R (same folder) as raw doubles, so that
mgcv sees bit-identical inputs; what comes back (smoothing parameters, effective degrees of
freedom summed per term, the REML score, posterior standard errors of the coefficients and of
the linear predictor at fixed rows, mgcv's outer convergence report, gradient and
Hessian of the REML score in log lambda) is stored with the mgcv
and R versions and the date.
"""

from __future__ import annotations

import datetime as _dt
import json
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))
import mgcv_problems  # noqa: E402  (helper next to the reference checks)

#: Rows (0-based) at which the standard error of the linear predictor is stored: the same
#: 40 evenly spaced bins of every problem.
N_ROWS_SE = 40


def rows_for_se(n_bins: int) -> np.ndarray:
    return np.linspace(0, n_bins - 1, N_ROWS_SE).round().astype(int)


def run_mgcv(design, y, offset) -> dict:
    xz = np.asfortranarray(design.dense() @ design.Z)
    pens = mgcv_problems.padded_penalties(design)
    rows = rows_for_se(design.n_rows)
    with tempfile.TemporaryDirectory() as tmp:
        d = Path(tmp)
        (d / "dims.txt").write_text(f"{xz.shape[0]} {xz.shape[1]} {len(pens)} {rows.size}\n")
        xz.ravel(order="F").astype("<f8").tofile(d / "X.bin")
        y.astype("<f8").tofile(d / "y.bin")
        np.full(design.n_rows, offset).astype("<f8").tofile(d / "offset.bin")
        for k, s in enumerate(pens, start=1):
            np.asfortranarray(s).ravel(order="F").astype("<f8").tofile(d / f"S{k}.bin")
        (rows + 1).astype("<f8").tofile(d / "rows_se.bin")
        subprocess.run(["Rscript", str(HERE / "fit_mgcv.R"), str(d)], check=True)

        def rd(name):
            return np.fromfile(d / name, dtype="<f8")

        meta = (d / "out_meta.txt").read_text().splitlines()
        edf = rd("out_edf.bin")
        edf_terms = {name: float(edf[sl].sum()) for name, sl in design.theta_slices.items()}
        return {"lambdas": rd("out_sp.bin").tolist(), "edf": edf_terms,
                "reml_score": float(rd("out_score.bin")[0]),
                "coef": rd("out_coef.bin").tolist(), "se_coef": rd("out_se_coef.bin").tolist(),
                "rows_se": rows.tolist(), "se_eta": rd("out_se_eta.bin").tolist(),
                "outer_gradient": rd("out_grad.bin").tolist(),
                "outer_hessian": rd("out_hess.bin").reshape(len(pens), len(pens)).tolist(),
                "mgcv_version": meta[0], "r_version": meta[1], "outer_convergence": meta[2],
                "outer_iterations": int(meta[3])}


def main() -> int:
    out = {"source": "mgcv::gam(y ~ X - 1 + offset(off), family = poisson(), method = 'REML', "
                     "paraPen = list(X = S)), reference_checks/mgcv/fit_mgcv.R",
           "made_by": "reference_checks/mgcv/make_reference.py",
           "date_utc": _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M"),
           "problems": {}}
    for name in mgcv_problems.PROBLEMS:
        design, y, offset = mgcv_problems.build(name)
        res = run_mgcv(design, y, offset)
        res["fingerprint"] = mgcv_problems.fingerprint(design, y)
        out["problems"][name] = res
        out["mgcv_version"], out["r_version"] = res["mgcv_version"], res["r_version"]
        print(name, res["lambdas"], res["edf"], res["reml_score"], res["outer_convergence"])
    (HERE / "mgcv_reference.json").write_text(json.dumps(out, indent=1) + "\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

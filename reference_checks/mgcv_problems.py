"""The simulated problems given to mgcv (reference_checks/mgcv/) and to encodex.

Each problem is built from numpy's PCG64 generator with a fixed seed and encodex's own bases,
so that reference_checks/mgcv/make_reference.py (which hands the dense constrained design,
the penalties, the offset and the counts to mgcv) and reference_checks/test_mgcv_reference.py
(which fits encodex) see bit-identical inputs. :func:`fingerprint` summarises the inputs; the
stored reference holds it so that a change of the simulated data or of the bases is reported
as such instead of as a disagreement with mgcv.
"""

from __future__ import annotations

import numpy as np

from encodex.design import CircularBasis, IntervalBasis, PlanarBasis, build_design

#: Bin width, s.
DT = 0.02


def _position_only(rng, n=20_000):
    xy = rng.uniform(0.0, 1.0, (n, 2))
    eta = (np.log(4.0) + 1.1 * np.exp(-((xy[:, 0] - 0.3) ** 2 + (xy[:, 1] - 0.6) ** 2) / 0.05)
           + 0.4 * np.sin(2 * np.pi * xy[:, 1]))
    cov = {"position": xy}
    bases = {"position": PlanarBasis(8, 8, (0.0, 1.0), (0.0, 1.0))}
    return cov, bases, eta


def _position_heading_speed(rng, n=30_000):
    xy = rng.uniform(0.0, 1.0, (n, 2))
    h = rng.uniform(0.0, 2 * np.pi, n)
    v = rng.gamma(2.0, 0.1, n)
    eta = (np.log(3.0) + 0.9 * np.exp(-((xy[:, 0] - 0.7) ** 2 + (xy[:, 1] - 0.4) ** 2) / 0.08)
           + 0.5 * np.cos(h - 1.0) + 0.8 * np.tanh(4 * v))
    cov = {"position": xy, "heading": h, "speed": v}
    bases = {"position": PlanarBasis(7, 7, (0.0, 1.0), (0.0, 1.0)),
             "heading": CircularBasis(10), "speed": IntervalBasis(8, (0.0, 1.2))}
    return cov, bases, eta


def _four_intervals(rng, n=25_000):
    h = rng.uniform(0.0, 2 * np.pi, n)
    v = rng.gamma(2.0, 0.1, n)
    dist = rng.uniform(0.0, 2.0, n)
    t = rng.uniform(0.0, 10.0, n)
    eta = (np.log(5.0) + 0.3 * np.sin(2 * h) + 0.6 * v + 0.4 * np.sin(2.5 * dist)
           + 0.05 * t)
    cov = {"heading": h, "speed": v, "distance": dist, "time": t}
    bases = {"heading": CircularBasis(12), "speed": IntervalBasis(8, (0.0, 1.2)),
             "distance": IntervalBasis(10, (0.0, 2.0)), "time": IntervalBasis(8, (0.0, 10.0))}
    return cov, bases, eta


#: name -> (builder, seed)
PROBLEMS = {"position_tensor": (_position_only, 101),
            "position_heading_speed": (_position_heading_speed, 102),
            "heading_speed_distance_time": (_four_intervals, 103)}


def build(name: str):
    """``(design, y, offset)`` of a problem (offset ``log DT``, a scalar)."""
    make, seed = PROBLEMS[name]
    rng = np.random.default_rng(seed)
    cov, bases, eta = make(rng)
    y = rng.poisson(np.exp(eta) * DT).astype(float)
    return build_design(cov, bases), y, float(np.log(DT))


def padded_penalties(design) -> list[np.ndarray]:
    """Every penalty as an (n_theta, n_theta) matrix in the constrained coordinates."""
    out = []
    for _, sl, sk in design.penalty_list:
        s = np.zeros((design.n_theta, design.n_theta))
        s[sl, sl] = sk
        out.append(s)
    return out


def fingerprint(design, y) -> dict:
    """Sums that change if the simulated data, the bases or the constraints change."""
    xz = design.dense() @ design.Z
    return {"n_bins": int(design.n_rows), "n_theta": int(design.n_theta),
            "n_spikes": int(y.sum()), "abs_sum_xz": float(np.abs(xz).sum()),
            "penalty_trace": [float(np.trace(s)) for _, _, s in design.penalty_list]}

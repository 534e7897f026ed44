"""The HTML report: self-contained, and it renders in headless Chromium with tables and images."""

import re
import shutil
import subprocess
from pathlib import Path

import pytest

from encodex.report.html import build_report, render_report
from encodex.report.testing import write_example_run

CHROMIUM_FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
                  "--no-first-run", "--disable-background-networking",
                  "--disable-component-update", "--disable-sync"]


def _chromium() -> str:
    exe = shutil.which("chromium") or shutil.which("chromium-browser")
    if exe is None and Path("/usr/bin/chromium").exists():
        exe = "/usr/bin/chromium"
    assert exe, "headless Chromium is needed: run make test (scripts/provision installs it)"
    return exe


@pytest.fixture(scope="module")
def report(tmp_path_factory):
    d = write_example_run(tmp_path_factory.mktemp("run") / "fit")
    return build_report(d, max_cells=2)


def test_report_is_self_contained(report):
    text = report.read_text(encoding="utf-8")
    # no remote or local resource: every image is a data URI, no script, no link tag
    assert not re.search(r"""(src|href)\s*=\s*['"](https?:|file:|//)""", text)
    assert "<script" not in text and "<link" not in text
    imgs = re.findall(r"<img [^>]*src='([^']*)'", text)
    assert len(imgs) >= 4  # population, comparison, two cells
    assert all(s.startswith("data:image/png;base64,") for s in imgs)
    assert "statistical statement at alpha = 0.05" in text
    assert "not proof of mechanism" in text
    for sid in ("summary", "tables", "population", "compare", "cells", "methods", "settings"):
        assert f"id='{sid}'" in text
    assert "too few spikes" in text and "McNemar exact" in text
    # 12 units x 2 environments = 24 pairs, 2 shown
    assert "22 further cell/environment pairs" in text


def test_report_renders_in_headless_chromium(report, tmp_path):
    # A copy with a probe script: after load it records whether every image decoded.
    probe = tmp_path / "probe.html"
    probe.write_text(report.read_text(encoding="utf-8").replace(
        "</body>",
        "<script>window.addEventListener('load',function(){var i=[].slice.call("
        "document.images);document.body.setAttribute('data-images',i.length);"
        "document.body.setAttribute('data-decoded',i.filter(function(x){return x.complete&&"
        "x.naturalWidth>0}).length);document.body.setAttribute('data-tables',"
        "document.querySelectorAll('table').length);});</script></body>"), encoding="utf-8")
    exe = _chromium()
    res = subprocess.run(
        [exe, *CHROMIUM_FLAGS, f"--user-data-dir={tmp_path / 'profile'}",
         "--virtual-time-budget=5000", "--dump-dom", probe.as_uri()],
        capture_output=True, text=True, timeout=120)
    assert res.returncode == 0, res.stderr[-2000:]
    dom = res.stdout
    m = re.search(r'data-images="(\d+)" data-decoded="(\d+)" data-tables="(\d+)"', dom)
    assert m, "the page did not finish loading: " + dom[:500]
    n_img, n_ok, n_tab = map(int, m.groups())
    assert n_img >= 4 and n_ok == n_img
    assert n_tab >= 6
    assert "Cells per label" in dom and "Methods" in dom
    # and a screenshot of the top of the page is not blank
    shot = tmp_path / "shot.png"
    res = subprocess.run(
        [exe, *CHROMIUM_FLAGS, f"--user-data-dir={tmp_path / 'profile2'}",
         "--window-size=1200,1600", f"--screenshot={shot}", report.as_uri()],
        capture_output=True, text=True, timeout=120)
    assert res.returncode == 0 and shot.exists(), res.stderr[-2000:]
    import matplotlib.image as mpimg

    px = mpimg.imread(shot)
    assert px.shape[0] == 1600 and px[..., :3].std() > 0.05


def test_cell_figures_in_workers_give_the_same_report(tmp_path):
    # Per-cell figures drawn by two worker processes, with a setting of the caller's
    # matplotlib (rcParams) that the workers must take over: the same HTML byte for byte as
    # one process draws, apart from the time stamp.
    import matplotlib

    from encodex.report.html import PARALLEL_MIN_CELLS
    from encodex.report.load import load_run

    run = load_run(write_example_run(tmp_path / "fit"))
    n = PARALLEL_MIN_CELLS
    stamp = re.compile(r"report written [0-9: -]+")
    with matplotlib.rc_context({"axes.facecolor": "#f0e8d8"}):
        one = stamp.sub("", render_report(run, max_cells=n, jobs=1))
        two = stamp.sub("", render_report(run, max_cells=n, jobs=2))
    plain = stamp.sub("", render_report(run, max_cells=n, jobs=1))

    def cell_images(text):
        return re.findall(r"<div class='cell'.*?src='([^']*)'", text, flags=re.S)

    assert len(cell_images(one)) == n
    assert one == two
    # The setting reached every cell figure, so a worker that lost it would show.
    assert all(a != b for a, b in zip(cell_images(plain), cell_images(one)))


def test_report_refuses_a_bad_number_of_workers(tmp_path):
    from encodex.errors import SettingsError

    d = write_example_run(tmp_path / "fit")
    with pytest.raises(SettingsError, match="jobs must be a positive integer"):
        build_report(d, max_cells=1, jobs=0)

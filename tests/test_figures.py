"""Figures: files in PNG and PDF, units on axes, the right panels for each cell."""

import matplotlib.pyplot as plt
import pytest

from encodex.errors import InputError
from encodex.report.environments import compare_environments
from encodex.report.figures import (
    cell_figure,
    comparison_figure,
    population_figure,
    save_figure,
)
from encodex.report.load import load_run
from encodex.report.testing import write_example_run


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    return load_run(write_example_run(tmp_path_factory.mktemp("run") / "fit"))


def _labels(fig):
    out = []
    for ax in fig.axes:
        out += [ax.get_xlabel(), ax.get_ylabel()]
    return [s for s in out if s]


def test_cell_figure_position_and_speed(run, tmp_path):
    fig = cell_figure(run, "u04", "arena_a")  # position+speed
    labels = _labels(fig)
    assert "x (m)" in labels and "y (m)" in labels
    assert "speed (m/s)" in labels
    # the selection path: held-out gain of each step per fold, p-value against its level
    assert "held-out gain of\nthe step (bits/spike)" in labels and "p-value" in labels
    # curves and both maps (with their colour bars) are in Hz; no rate multiplier left
    assert labels.count("rate (Hz)") >= 3
    assert not any("gain (x" in lab for lab in labels)
    assert any("statistical statements at alpha = 0.05" in t.get_text() for t in fig.texts)
    titles = " ".join(ax.get_title() for ax in fig.axes)
    assert "Skaggs" in titles and "bits/spike" in titles
    # the speed panel draws the 95% band as a filled polygon
    speed_ax = next(ax for ax in fig.axes if ax.get_xlabel() == "speed (m/s)")
    assert len(speed_ax.collections) >= 1
    # the position map is an image with the arena outline drawn on top
    pos_ax = next(ax for ax in fig.axes if ax.get_title() == "position: model")
    assert len(pos_ax.images) == 1 and len(pos_ax.patches) == 1
    # fitted and observed maps share the colour map and the colour scale
    obs_ax = next(ax for ax in fig.axes if ax.get_title().startswith("observed, unsmoothed"))
    assert obs_ax.images[0].get_cmap().name == pos_ax.images[0].get_cmap().name
    assert obs_ax.images[0].get_clim() == pos_ax.images[0].get_clim()
    # each variable has its colour, the same in every cell
    from encodex.report.palette import variable_colour

    assert speed_ax.lines[-1].get_color() == variable_colour("speed")
    other = cell_figure(run, "u05", "arena_a")  # speed alone
    sp = next(ax for ax in other.axes if ax.get_xlabel() == "speed (m/s)")
    assert sp.lines[-1].get_color() == variable_colour("speed")
    plt.close(other)
    files = save_figure(fig, tmp_path / "cell")
    plt.close(fig)
    assert [p.suffix for p in files] == [".png", ".pdf"]
    assert files[0].read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert files[1].read_bytes()[:5] == b"%PDF-"


def test_heading_axis_in_radians_and_excluded_cell(run):
    fig = cell_figure(run, "u03", "arena_a")
    assert "heading (rad)" in _labels(fig)
    plt.close(fig)
    fig = cell_figure(run, "u09", "arena_a")  # too few spikes: no response panel
    assert "not labelled (too few spikes)" in fig.get_suptitle()
    assert not any(ax.get_ylabel() == "p-value" for ax in fig.axes)  # no selection path
    plt.close(fig)
    with pytest.raises(InputError, match="not in cells.csv"):
        cell_figure(run, "nope", "arena_a")


def test_population_figure_percentages(run):
    fig = population_figure(run.cells, run.alpha)
    assert len(fig.axes) == 2  # one panel per environment
    for ax in fig.axes:
        widths = [p.get_width() for c in ax.containers for p in c]
        assert sum(widths) == pytest.approx(100.0)  # percent of the classified cells
        assert ax.get_xlabel().startswith("% of labelled cells")
    assert any("not proof of mechanism" in t.get_text() for t in fig.texts)
    plt.close(fig)


def test_comparison_figure_paired_and_unpaired(run):
    fig = comparison_figure(compare_environments(run, "arena_a", "arena_b"))
    assert len(fig.axes) == 3  # transitions, its colour bar, fractions
    assert "label in arena_b" in _labels(fig)
    plt.close(fig)
    fig = comparison_figure(compare_environments(run, "arena_a", "arena_b", paired=False))
    assert len(fig.axes) == 1 and "unpaired" in fig.axes[0].get_title()
    xl = fig.axes[0].get_xlabel()
    assert "%" in xl and "Wilson" in xl
    plt.close(fig)

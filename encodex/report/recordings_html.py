"""One self-contained HTML page comparing recordings (figures embedded, no script)."""

from __future__ import annotations

import datetime as _dt
import html
import json
from pathlib import Path

from encodex.errors import OutputError
from encodex.report.environments import summary_frame
from encodex.report.figures import comparison_figure
from encodex.report.html import _CSS, _img, _table, _transition_frame

__all__ = ["render_recordings_report", "write_recordings_report"]


def _part(cmp, heading: str) -> list[str]:
    parts = [f"<h3>{html.escape(heading)}</h3>"]
    parts += [f"<p>{html.escape(n)}</p>" for n in cmp.notes]
    parts.append(_img(comparison_figure(cmp), f"{cmp.a} vs {cmp.b}"))
    if cmp.paired:
        parts += [f"<h4>Label transitions (rows: {html.escape(cmp.a)}, columns: "
                  f"{html.escape(cmp.b)})</h4>",
                  _table(_transition_frame(cmp.transitions, cmp.a, cmp.b))]
    parts += ["<h4>Per variable</h4>", _table(summary_frame(cmp)),
              "<h4>Held-out gains</h4>", _table(cmp.gains)]
    if cmp.paired:
        parts += ["<h4>Active in one recording, silent in the other</h4>",
                  _table(cmp.activity)]
    if not cmp.stability.empty:
        st = (cmp.stability.groupby("variable")["correlation"]
              .agg(cells="count", median="median").reset_index())
        parts += ["<h4>Stability of matched response curves (correlation)</h4>",
                  _table(st), _table(cmp.stability)]
    return parts


def render_recordings_report(comparisons, title: str = "encodex: comparing recordings") -> str:
    """HTML text of one or more :class:`encodex.report.recordings.RecordingComparison`."""
    parts = [
        "<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>",
        f"<title>{html.escape(title)}</title><style>{_CSS}</style></head><body>",
        f"<header><h1>{html.escape(title)}</h1><p>written "
        f"{_dt.datetime.now().strftime('%Y-%m-%d %H:%M')}</p></header><main>",
    ]
    for cmp in comparisons:
        first = cmp.comparisons[0]
        parts += [f"<section><h2>{html.escape(cmp.a)} vs {html.escape(cmp.b)}</h2>",
                  f"<div class='caveat'>{html.escape(first.caveat)}</div>"]
        parts += [f"<p>{html.escape(n)}</p>" for n in cmp.notes]
        if cmp.paired is not None:
            parts += _part(cmp.paired, "Matched cells (paired tests)")
        if cmp.unpaired is not None:
            parts += _part(cmp.unpaired, "Cells without a partner (unpaired tests)")
        parts += ["<h3>Matching used</h3>", _table(cmp.matching),
                  "<h3>Provenance of each folder</h3>",
                  f"<pre>{html.escape(json.dumps(cmp.provenance, indent=2, default=str))}</pre>",
                  "</section>"]
    parts.append("</main></body></html>")
    return "\n".join(parts)


def write_recordings_report(comparisons, path) -> Path:
    """Write :func:`render_recordings_report` to ``path``; returns it."""
    path = Path(path)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(render_recordings_report(comparisons), encoding="utf-8")
    except OSError as exc:
        raise OutputError(f"cannot write {path} ({exc.strerror}); choose a writable path")
    return path

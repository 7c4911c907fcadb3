"""The self-contained HTML report of a comparison.

One file, nothing fetched when it is opened: CSS is inline, every figure is a PNG in a
``data:image/png;base64`` URI, and there is no script. Sections: what was compared, the runs
table, each varying param against each key metric, the z histograms and coverage curves
overlaid, the best and the worst run's map grid, and notes on what was missing.
"""

from __future__ import annotations

import base64
import html
import os
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from skymoments.atomic import atomic_path
from skymoments.compare.artifacts import GRID_PATH, CalibrationCurves, fetch_curves, fetch_png
from skymoments.compare.core import KEY_METRICS, Comparison, format_value
from skymoments.compare.figures import coverage_figure, param_figure, z_hist_figure
from skymoments.compare.table import shown_status

__all__ = ["ReportInputs", "collect_inputs", "render_html", "write_html"]

_CSS = """
body { font-family: system-ui, sans-serif; margin: 1.5em; color: #222; max-width: 1400px; }
h1 { font-size: 1.5em; } h2 { font-size: 1.2em; margin-top: 1.6em; border-bottom: 1px solid #ccc; }
table.runs { border-collapse: collapse; font-size: 0.85em; }
table.runs th, table.runs td { border: 1px solid #ccc; padding: 3px 6px; text-align: right; }
table.runs th { background: #f0f0f0; }
table.runs td.text { text-align: left; }
tr.unranked { color: #888; }
tr.best td { background: #eef8ee; } tr.worst td { background: #fbeeee; }
td.status-FAILED, td.status-KILLED, td.status-LOST { color: #b00; font-weight: bold; }
.scroll { overflow-x: auto; }
figure { margin: 1em 0; } figcaption { font-size: 0.85em; color: #555; }
img { max-width: 100%; border: 1px solid #eee; }
.missing { color: #b00; font-style: italic; }
dl.meta dt { font-weight: bold; float: left; clear: left; width: 9em; }
dl.meta dd { margin-left: 10em; }
.grids { display: flex; flex-wrap: wrap; gap: 1.5em; }
.grids figure { flex: 1 1 600px; }
"""


@dataclass
class ReportInputs:
    """Artifacts fetched for the report.

    Attributes
    ----------
    curves : dict of str to CalibrationCurves
        Per ranked run id.
    grids : dict of str to (bytes or None, str)
        ``maps/grid.png`` of the best and the worst run: PNG bytes or None with a note.
    notes : list of str
        Missing artifacts, one line each.
    """

    curves: dict[str, CalibrationCurves] = field(default_factory=dict)
    grids: dict[str, tuple[bytes | None, str]] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)


def collect_inputs(comp: Comparison, tracking: Any | None = None) -> ReportInputs:
    """Download the calibration arrays of the ranked runs and the best/worst map grids."""
    tracking = tracking if tracking is not None else comp.selection.settings
    inputs = ReportInputs()
    for entry in comp.ranked:
        run = entry.run
        curves = fetch_curves(tracking, run.run_id)
        inputs.curves[run.run_id] = curves
        for note in curves.notes:
            inputs.notes.append(f"run {run.name or ''} {run.run_id}: {note}")
    for entry in {id(e): e for e in (comp.best, comp.worst) if e is not None}.values():
        data, note = fetch_png(tracking, entry.run.run_id, GRID_PATH)
        inputs.grids[entry.run.run_id] = (data, note)
        if data is None:
            inputs.notes.append(f"run {entry.run.name or ''} {entry.run.run_id}: {note}")
    return inputs


def _e(text: Any) -> str:
    return html.escape(str(text), quote=True)


def _img(png: bytes, alt: str) -> str:
    data = base64.b64encode(png).decode("ascii")
    return f'<img src="data:image/png;base64,{data}" alt="{_e(alt)}">'


def _figure(png: bytes | None, alt: str, caption: str, missing: str) -> str:
    if png is None:
        return f'<p class="missing">{_e(missing)}</p>'
    return f"<figure>{_img(png, alt)}<figcaption>{_e(caption)}</figcaption></figure>"


def _runs_table(comp: Comparison) -> str:
    head = ["rank", "run", "run id", "status", comp.objective.name]
    head += [p.key for p in comp.params]
    for label, _stem, _ in KEY_METRICS:
        head += [f"{label} E", f"{label} B"]
    rows = ["<tr>" + "".join(f'<th title="{_e(h)}">{_e(h)}</th>' for h in head) + "</tr>"]
    best = comp.best.run.run_id if comp.best else None
    worst = comp.worst.run.run_id if comp.worst else None
    for i, entry in enumerate(comp.entries):
        run = entry.run
        status = shown_status(run)
        classes = ["run", "ranked" if entry.ranked else "unranked"]
        if run.run_id == best:
            classes.append("best")
        elif run.run_id == worst:
            classes.append("worst")
        cells = [
            f"<td>{entry.rank if entry.ranked else '-'}</td>",
            f'<td class="text">{_e(run.name or "(unnamed)")}</td>',
            f'<td class="text"><code>{_e(run.run_id)}</code></td>',
            f'<td class="text status-{_e(status)}">{_e(status)}</td>',
            f"<td>{_e(format_value(entry.value))}</td>",
        ]
        for p in comp.params:
            v = p.values[i]
            cells.append(f'<td class="text">{_e("-" if v is None else v)}</td>')
        for _, stem, _ in KEY_METRICS:
            for c in ("E", "B"):
                cells.append(f"<td>{_e(format_value(run.metrics.get(f'{stem}_{c}')))}</td>")
        rows.append(
            f'<tr class="{" ".join(classes)}" data-run-id="{_e(run.run_id)}">'
            + "".join(cells)
            + "</tr>"
        )
    return '<div class="scroll"><table class="runs">' + "\n".join(rows) + "</table></div>"


def _unranked_list(comp: Comparison) -> str:
    if not comp.unranked:
        return ""
    items = []
    for entry in comp.unranked:
        error = entry.run.tags.get("skymoments.error", "")
        detail = f": {error}" if error else ""
        items.append(
            f"<li><code>{_e(entry.run.run_id)}</code> {_e(entry.run.name)} "
            f"({_e(entry.reason)}){_e(detail)}</li>"
        )
    return '<h3>Not ranked</h3><ul class="unranked">' + "".join(items) + "</ul>"


def _lost_list(comp: Comparison) -> str:
    """RUNNING runs whose heartbeat stopped, as the terminal table lists them."""
    lost = [e.run for e in comp.entries if shown_status(e.run) == "LOST"]
    if not lost:
        return ""
    items = [
        f"<li><code>{_e(run.run_id)}</code> {_e(run.name)}: RUNNING in the store but its "
        "heartbeat stopped (its process is gone); <code>skymoments settle "
        "settle.mark=true</code> marks it KILLED</li>"
        for run in lost
    ]
    return '<h3>Lost</h3><ul class="lost">' + "".join(items) + "</ul>"


def render_html(
    comp: Comparison, inputs: ReportInputs, title: str = "skymoments comparison"
) -> str:
    """The report as one HTML string (see the module docstring for its sections)."""
    sel = comp.selection
    stamp = datetime.now(tz=UTC).strftime("%Y-%m-%d %H:%M UTC")
    n_failed = sum(e.run.status == "FAILED" for e in comp.entries)
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        f"<title>{_e(title)}</title><style>{_CSS}</style></head><body>",
        f"<h1>{_e(title)}</h1>",
        '<dl class="meta">',
        f"<dt>compared</dt><dd>{_e(sel.description)}</dd>",
        f"<dt>store</dt><dd><code>{_e(sel.settings.tracking_uri)}</code></dd>",
        f"<dt>objective</dt><dd>{_e(comp.objective.description)}</dd>",
        f"<dt>runs</dt><dd>{len(comp.entries)} ({len(comp.ranked)} ranked, {n_failed} failed)</dd>",
        f"<dt>generated</dt><dd>{stamp}</dd>",
        "</dl>",
        '<h2 id="runs">Runs</h2>',
        _runs_table(comp),
        _unranked_list(comp),
        _lost_list(comp),
    ]
    aliased = [p for p in comp.params if p.aliases]
    if aliased:
        parts.append("<p>Params that vary together (these runs cannot tell them apart):</p><ul>")
        parts += [f"<li><b>{_e(p.key)}</b>: {_e(', '.join(p.aliases))}</li>" for p in aliased]
        parts.append("</ul>")

    parts.append('<h2 id="params">Params against metrics</h2>')
    if not comp.params:
        parts.append('<p class="missing">No param varies across these runs.</p>')
    elif not comp.ranked and not any(e.run.status == "FINISHED" for e in comp.entries):
        parts.append('<p class="missing">No finished run: no metrics to plot.</p>')
    else:
        for p in comp.params:
            kind = "numeric" if p.numeric else "categorical"
            caption = (
                f"{p.key} ({kind}{', a config-group choice' if p.group_choice else ''}) "
                "against the objective and each key metric; E circles, B squares; the best "
                "run ringed in red; dashed: the ideal value"
            )
            parts.append(_figure(param_figure(comp, p), f"{p.key} against metrics", caption, ""))

    parts.append('<h2 id="zhist">z histograms</h2>')
    parts.append(
        _figure(
            z_hist_figure(comp, inputs.curves),
            "z histograms",
            "Density of z = (truth - mean)/std over validation pixels, each ranked run "
            "(colour by rank, darkest best), against N(0, 1) (dashed).",
            "No ranked run has z histograms (calibration/arrays.npz with z_hist_edges, "
            "z_hist_E, z_hist_B).",
        )
    )
    parts.append('<h2 id="coverage">Coverage curves</h2>')
    parts.append(
        _figure(
            coverage_figure(comp, inputs.curves),
            "coverage curves",
            "Fraction of pixels inside the Gaussian central interval at each nominal level; "
            "the diagonal is perfect calibration, below it over-confident.",
            "No ranked run has coverage curves (calibration/arrays.npz with coverage_levels, "
            "coverage_E, coverage_B).",
        )
    )
    parts.append('<h2 id="grids">Best and worst run</h2>')
    if comp.best is None:
        parts.append('<p class="missing">No ranked run.</p>')
    else:
        parts.append('<div class="grids">')
        pairs = [("best", comp.best), ("worst", comp.worst)]
        if comp.best.run.run_id == comp.worst.run.run_id:
            pairs = [("best and worst (only one ranked run)", comp.best)]
        for label, entry in pairs:
            png, note = inputs.grids.get(entry.run.run_id, (None, "not fetched"))
            name = entry.run.name or entry.run.run_id
            parts.append(f"<div><h3>{_e(label)}: #{entry.rank} {_e(name)}</h3>")
            parts.append(
                _figure(
                    png,
                    f"{label} run map grid",
                    f"{GRID_PATH} of run {entry.run.run_id} ({comp.objective.name} = "
                    f"{format_value(entry.value)})",
                    f"Map grid not available for run {entry.run.run_id}: {note}.",
                )
            )
            parts.append("</div>")
        parts.append("</div>")
    notes = comp.notes + inputs.notes
    if notes:
        parts.append('<h2 id="notes">Notes</h2><ul class="notes">')
        parts += [f"<li>{_e(n)}</li>" for n in notes]
        parts.append("</ul>")
    parts.append("</body></html>")
    return "\n".join(parts)


def write_html(text: str, path: str | os.PathLike) -> Path:
    """Write the report atomically (a reader never sees half a file); returns the path."""
    final = Path(path).expanduser()
    if final.suffix.lower() not in (".html", ".htm"):
        raise ValueError(f"compare.out={str(path)!r} should name an .html file")
    with atomic_path(final) as tmp:
        tmp.write_text(text, encoding="utf-8")
    return final.absolute()

"""The terminal tables of a comparison (rich).

Two tables, so that both fit an 80-column terminal:

* the ranking: one row per run, best first, unranked runs last (dimmed, status in red), with
  the rank, the run's name and short id, its status (``LOST`` for a RUNNING run whose
  heartbeat stopped), the objective and the params that vary
  (a representative of each confounded group, at most ``max_param_columns`` of them);
* the key metrics: two rows per run with metrics (component E, then B), same order, one
  column per metric.
"""

from __future__ import annotations

import io

from rich.console import Console
from rich.table import Table
from rich.text import Text

from skymoments.calibration.metrics import COMPONENTS
from skymoments.compare.core import KEY_METRICS, Comparison, format_value
from skymoments.tracking.liveness import lost_for_s

__all__ = [
    "comparison_table",
    "metrics_table",
    "print_comparison",
    "render_text",
    "shown_status",
]


def _short(run_id: str) -> str:
    return run_id[:8]


def _rank(entry) -> str:
    return str(entry.rank) if entry.ranked else "-"


def shown_status(run) -> str:
    """The run's status, or ``LOST`` for a RUNNING run whose heartbeat stopped."""
    return "LOST" if lost_for_s(run.status, run.tags) is not None else run.status


def comparison_table(comp: Comparison, max_param_columns: int = 6) -> Table:
    """The ranking table of ``comp``: runs, status, objective, varying params."""
    table = Table(
        title=f"{len(comp.entries)} runs: {comp.selection.description}",
        caption=f"ranked by {comp.objective.description}",
        header_style="bold",
    )
    table.add_column("#", justify="right")
    table.add_column("run", overflow="fold")
    table.add_column("id")
    table.add_column("status")
    table.add_column(comp.objective.name, justify="right")
    shown = comp.params[: max(0, max_param_columns)]
    for p in shown:
        table.add_column(p.key + (f" (+{len(p.aliases)})" if p.aliases else ""), overflow="fold")
    for i, entry in enumerate(comp.entries):
        run = entry.run
        status = Text(shown_status(run), style="green" if run.status == "FINISHED" else "red")
        cells: list = [
            _rank(entry),
            run.name or "(unnamed)",
            _short(run.run_id),
            status,
            format_value(entry.value),
        ]
        cells += ["-" if p.values[i] is None else p.values[i] for p in shown]
        table.add_row(*cells, style=None if entry.ranked else "dim")
    return table


def metrics_table(comp: Comparison) -> Table | None:
    """The key metrics per run and component, in ranking order; None when no run has any."""
    stems = [stem for _, stem, _ in KEY_METRICS]
    entries = [
        e
        for e in comp.entries
        if any(f"{s}_{c}" in e.run.metrics for s in stems for c in COMPONENTS)
    ]
    if not entries:
        return None
    table = Table(title="key metrics", header_style="bold")
    table.add_column("#", justify="right")
    table.add_column("run", overflow="fold")
    table.add_column("C")
    for label, _, ideal in KEY_METRICS:
        header = label if ideal is None else f"{label}\n({format_value(ideal)})"
        table.add_column(header, justify="right")
    for entry in entries:
        for k, c in enumerate(COMPONENTS):
            cells = [_rank(entry) if k == 0 else "", (entry.run.name or "") if k == 0 else "", c]
            cells += [format_value(entry.run.metrics.get(f"{stem}_{c}")) for stem in stems]
            table.add_row(
                *cells,
                style=None if entry.ranked else "dim",
                end_section=k == len(COMPONENTS) - 1,
            )
    return table


def print_comparison(
    comp: Comparison, console: Console | None = None, max_param_columns: int = 6
) -> None:
    """Print the table, then what it could not show (more params, aliases, unranked runs)."""
    console = console or Console()
    console.print(comparison_table(comp, max_param_columns))
    metrics = metrics_table(comp)
    if metrics is not None:
        console.print(metrics)
    hidden = comp.params[max(0, max_param_columns) :]
    if hidden:
        console.print(
            f"{len(hidden)} more varying params (in the HTML report): "
            + ", ".join(p.key for p in hidden)
        )
    for p in comp.params:
        if p.aliases:
            console.print(f"{p.key} varies together with: {', '.join(p.aliases)}")
    if not comp.params:
        console.print("no param varies across these runs")
    for entry in comp.unranked:
        console.print(f"not ranked: {entry.run.name or entry.run.run_id} ({entry.reason})")
    lost = [e.run for e in comp.entries if shown_status(e.run) == "LOST"]
    for run in lost:
        console.print(
            f"lost: run {run.run_id} is RUNNING but its heartbeat stopped (its process is "
            "gone); `skymoments settle settle.mark=true` marks it KILLED"
        )
    for note in comp.notes:
        console.print(f"note: {note}")


def render_text(comp: Comparison, width: int = 200, max_param_columns: int = 6) -> str:
    """What :func:`print_comparison` prints, as plain text (no colour) at ``width``."""
    buffer = io.StringIO()
    console = Console(file=buffer, width=width, no_color=True, force_terminal=False)
    print_comparison(comp, console=console, max_param_columns=max_param_columns)
    return buffer.getvalue()

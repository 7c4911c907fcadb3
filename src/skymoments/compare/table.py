"""The terminal table of a comparison (rich).

Layout: one row per run, best first, unranked runs last (dimmed, their status in red). The
columns are the rank, the run (name and short id), the status, the objective, the params that
vary (a representative of each confounded group, at most ``max_param_columns`` of them), then
the key metrics with E and B in one cell (``E / B``).
"""

from __future__ import annotations

import io

from rich.console import Console
from rich.table import Table
from rich.text import Text

from skymoments.compare.core import KEY_METRICS, Comparison, format_value, metric_pair

__all__ = ["comparison_table", "print_comparison", "render_text"]


def _short(run_id: str) -> str:
    return run_id[:8]


def comparison_table(comp: Comparison, max_param_columns: int = 6) -> Table:
    """The runs table of ``comp`` as a rich Table."""
    title = f"{len(comp.entries)} runs: {comp.selection.description}"
    table = Table(
        title=title,
        caption=f"ranked by {comp.objective.description}",
        header_style="bold",
        show_lines=False,
    )
    table.add_column("#", justify="right")
    table.add_column("run")
    table.add_column("status")
    table.add_column(comp.objective.name, justify="right")
    shown = comp.params[: max(0, max_param_columns)]
    for p in shown:
        header = p.key + (f" (+{len(p.aliases)})" if p.aliases else "")
        table.add_column(header, overflow="fold")
    for label, _, _ in KEY_METRICS:
        table.add_column(f"{label}\nE / B", justify="right")
    for i, entry in enumerate(comp.entries):
        run = entry.run
        status = Text(run.status, style="green" if run.status == "FINISHED" else "red")
        cells: list = [
            str(entry.rank) if entry.ranked else "-",
            f"{run.name or '(unnamed)'} {_short(run.run_id)}",
            status,
            format_value(entry.value),
        ]
        for p in shown:
            value = p.values[i]
            cells.append("-" if value is None else value)
        for _, stem, _ in KEY_METRICS:
            e, b = metric_pair(run.metrics, stem)
            cells.append(f"{format_value(e)} / {format_value(b)}")
        table.add_row(*cells, style=None if entry.ranked else "dim")
    return table


def print_comparison(
    comp: Comparison, console: Console | None = None, max_param_columns: int = 6
) -> None:
    """Print the table, then what it could not show (more params, aliases, unranked runs)."""
    console = console or Console()
    console.print(comparison_table(comp, max_param_columns))
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
    for note in comp.notes:
        console.print(f"note: {note}")


def render_text(comp: Comparison, width: int = 200, max_param_columns: int = 6) -> str:
    """What :func:`print_comparison` prints, as plain text (no colour) at ``width``."""
    buffer = io.StringIO()
    console = Console(file=buffer, width=width, no_color=True, force_terminal=False)
    print_comparison(comp, console=console, max_param_columns=max_param_columns)
    return buffer.getvalue()

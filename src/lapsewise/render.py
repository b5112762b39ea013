"""Human output: rich tables, each followed by a one-line reading of what it means.

Rendering reads results; it does not compute them.
"""

from __future__ import annotations

import math

from rich.console import Console
from rich.table import Table

from lapsewise.panel import Panel, base_table, quarter_label, quarter_start, summarize

CAUTION = (
    "Customer files are personal data: keep them on this machine, honour opt-outs and suppression lists, "
    "and follow local direct-mail and data-protection law. The figures are estimates, not guarantees."
)
ALL_MAILED_NOTE = "No mailings file: every quarter after a customer's first order is counted as mailed."


def money(value: float) -> str:
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "-"
    return f"{value:,.2f}"


def print_counts(console: Console, counts: dict[str, int]) -> None:
    if not counts:
        console.print("Nothing was left out or repaired.")
        return
    table = Table(title="Left out or repaired", title_justify="left")
    table.add_column("What")
    table.add_column("Count", justify="right")
    for what, count in counts.items():
        table.add_row(what, f"{count:,}")
    console.print(table)


def print_panel_summary(console: Console, panel: Panel) -> None:
    """The customer base by frequency and silent quarters, the data range and what was repaired."""
    summary = summarize(panel)
    cells = base_table(summary)
    first = quarter_start(int(panel.first_quarter.min()), panel.fiscal_year_start)
    console.print(
        f"[bold]{panel.customers:,} customers[/bold], first purchases from the quarter starting {first}; "
        f"as-of quarter {quarter_label(panel.end_quarter, panel.fiscal_year_start)}."
    )
    if not panel.mailing_history:
        console.print(ALL_MAILED_NOTE)
    table = Table(
        title="Customers (count) and mean order value (currency units) by repeat purchases and silent quarters",
        title_justify="left",
    )
    table.add_column("Repeat purchases")
    silent_labels = list(dict.fromkeys(cells["silent_band"]))
    for label in silent_labels:
        table.add_column(f"{label} silent q", justify="right")
    for frequency, rows in cells.groupby("frequency_band", sort=False):
        row = [str(frequency)]
        for _, cell in rows.iterrows():
            row.append(f"{cell.customers:,}\n{money(cell.mean_order_value)}" if cell.customers else "-")
        table.add_row(*row, end_section=True)
    console.print(table)
    one_time = int((summary.x == 0).sum())
    lapsed = int((summary.silent_quarters >= 4).sum())
    console.print(
        f"{one_time / panel.customers:.0%} of customers have bought only once; "
        f"{lapsed / panel.customers:.0%} have been silent for 4 quarters or more, "
        "the ones a 'drop after four silent quarters' rule would stop mailing."
    )
    print_counts(console, panel.counts)


def print_caution(console: Console) -> None:
    console.print(f"[dim]{CAUTION}[/dim]")

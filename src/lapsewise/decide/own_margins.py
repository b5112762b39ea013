"""Values at each customer's own margin, from programs solved at a few margins, with a certified bound on each.

A customer's margin per order (``gross_margin * order_value - order_cost``) comes
from their own expected order value, so a base holds about as many margins as
customers, and one program per margin is out of reach. Every value the program
gives is convex and piecewise linear in the margin (see
:class:`~lapsewise.decide.decisions.Between`), which brackets it between two
solved margins: the chord through the solved values lies above it, and below it
lie the secants through the neighbouring solved margins, extended, or the
tangent lines at the two margins (the solved plans' discounted orders are their
slopes). The decisions at a customer's silent state are taken at the customer's
own margin from the bracketed plan values: the best plan over J is chosen at the
customer's margin, not interpolated.

:func:`own_margin_values` solves a grid of margins over the customers' range
(most of them over the core of the customers' margins, evenly in the log of the
margin above the core's low end plus a 64th of its width: about evenly in ratio,
and evenly in m near the low end; two in each tail) and takes each customer's value of mailing as the
middle of its bracket, so it lies within half the bracket's width (``bound``) of
a program solved at the customer's own margin. On request (``refine``) it
solves each margin with its slopes, for the tighter tangent bounds, and where a
customer's bound is wider than the tolerance -- 1% of the value or 0.01
currency units, whichever is larger -- splits the interval at its middle and
values its customers again, until every value is certified. A handful of
distinct margins are each solved exactly.

Measured against programs solved at sampled states' own margins: on the demo base
(20,000 customers, 15,493 distinct states, 200 sampled) the 17-margin grid's
values were off by at most 0.003 (mean 0.0004), with 43% of the states
certified (33% of the customers); on the million-customer benchmark (936,878
states, 40 sampled) by at most 0.0014, with 65% of the states certified. Refining certified every value on the demo base
with 69 margins (117 and 65 s at a million customers). Reading each customer at their spend band's order value instead
was off by 0.34 on average.
"""

from __future__ import annotations

import math
from collections import OrderedDict
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass
from typing import Callable

import numpy as np

from lapsewise.decide.decisions import Between
from lapsewise.decide.program import Chances, Program, solve_with
from lapsewise.errors import InputError
from lapsewise.machine import available_memory, gigabytes

ABSOLUTE_TOLERANCE = 0.01
"""Currency units: a value of mailing is certified when its bounds are this close (or RELATIVE_TOLERANCE of it)."""
RELATIVE_TOLERANCE = 0.01
GRID_MARGINS = 17
"""Margins solved before any refinement, over the customers' range."""
SMALLEST_SPLIT = 1e-9
"""An interval narrower than this share of its margins is not split again."""
KEPT_PROGRAMS = 4
"""Solved programs kept for reuse while the grid is walked (each is about 70 MB at a million customers, twice that with slopes)."""


@dataclass(frozen=True)
class OwnMarginValues:
    """Values of mailing at the rows' own margins, (rows, versions), and how far each may lie from an exact solve.

    ``bound`` is, per row, the largest over versions of the certified distance between the value and the value a
    program solved at the row's own margin gives (0 where the row's margin was solved; NaN when no bounds were
    computed); ``margins`` are the margins solved, in the order they were solved.
    """

    values: np.ndarray
    bound: np.ndarray
    margins: tuple[float, ...]

    @property
    def solved(self) -> int:
        return len(set(self.margins))

    def certified(self, absolute: float = ABSOLUTE_TOLERANCE, relative: float = RELATIVE_TOLERANCE) -> np.ndarray:
        """Rows whose every version's value is within the tolerance of an exact solve."""
        return self.bound <= np.maximum(absolute, relative * np.abs(self.values).min(axis=1))


Parts = Callable[[object, np.ndarray], tuple[np.ndarray, np.ndarray]]
"""``parts(program, rows)``: for the given rows, the value of mailing each version then following the program
(rows, versions) and the value of holding (rows,), with ``program`` a Program or a Between."""


def own_margin_values(
    prepared: Chances,
    margins: np.ndarray,
    parts: Parts,
    *,
    grid_margins: int = GRID_MARGINS,
    bounds: bool = True,
    refine: bool = False,
    absolute: float = ABSOLUTE_TOLERANCE,
    relative: float = RELATIVE_TOLERANCE,
) -> OwnMarginValues:
    """Each row's value of mailing at its own margin ``margins[row]`` (see the module docstring).

    With ``bounds`` (the default) each value is the middle of its certified bracket and ``bound`` its half-width;
    the bracket's lower lines are the secants through the grid's neighbouring margins, so no slopes are solved.
    With ``refine`` the programs are solved with their slopes, the lower lines are the tangents (tighter, and
    needing no neighbours), and an interval is split until every row is certified (``absolute``, ``relative``).
    Without ``bounds`` the values are the chords. At most ``grid_margins`` distinct margins are each solved exactly.
    """
    margins = np.asarray(margins, dtype=float)
    with ThreadPoolExecutor(max_workers=1) as ahead:
        return _own_margin_values(prepared, margins, parts, ahead, grid_margins, bounds, refine, absolute, relative)


def _own_margin_values(prepared, margins, parts, ahead, grid_margins, bounds, refine, absolute, relative) -> OwnMarginValues:
    """:func:`own_margin_values` with ``ahead``, a worker that solves the grid's next program while an interval is valued."""
    cache: OrderedDict[float, Program] = OrderedDict()
    coming: dict[float, Future] = {}
    order: list[float] = []
    # An interval reads four programs at once with the secants, two otherwise; one more is solved ahead if it fits.
    at_once = 4 if bounds and not refine else 2
    room = {"ahead": False, "kept": at_once}

    def solve_ahead(margin: float) -> None:
        if room["ahead"] and margin not in cache and margin not in coming:
            coming[margin] = ahead.submit(solve_with, prepared, margin, refine)

    def program_at(margin: float) -> Program:
        if margin in cache:
            cache.move_to_end(margin)
            return cache[margin]
        program = coming.pop(margin).result() if margin in coming else solve_with(prepared, margin, slopes=refine)
        if not order:
            room["kept"], room["ahead"] = _room(program, at_once)
        order.append(margin)
        cache[margin] = program
        if len(cache) > room["kept"]:
            cache.popitem(last=False)
        return program

    distinct, inverse = np.unique(margins, return_inverse=True)
    inverse = inverse.ravel()
    values = None
    if len(distinct) <= grid_margins:
        for index, margin in enumerate(distinct):
            rows = np.flatnonzero(inverse == index)
            mail, hold = parts(program_at(float(margin)), rows)
            if values is None:
                values = np.empty((len(margins), mail.shape[1]))
            values[rows] = mail - hold[:, None]
        return OwnMarginValues(values, np.zeros(len(margins)), tuple(order))

    grid = margin_grid(margins, grid_margins)
    bound = np.full(len(margins), np.nan)
    interval = np.clip(np.searchsorted(grid, margins, side="right") - 1, 0, len(grid) - 2)
    # Depth first, left to right, so that the programs an interval needs are still kept.
    pending = [(k, grid[k], grid[k + 1], np.flatnonzero(interval == k)) for k in range(len(grid) - 2, -1, -1)]
    while pending:
        k, low, high, rows = pending.pop()
        if not len(rows):
            continue
        if low == grid[k] and k + 3 < len(grid):
            solve_ahead(float(grid[k + 3]))  # the next interval's farthest program, solved while this one is valued
        first, second = program_at(float(low)), program_at(float(high))
        own = margins[rows]
        if not bounds:
            mail, hold = parts(Between((None, first, second, None), own, "chord"), rows)
        elif refine:
            mail, hold = parts(Between((first.slopes(), first, second, second.slopes()), own, "bracket", "slopes"), rows)
        else:
            outside = (program_at(float(grid[k - 1])) if k > 0 else None, first, second, program_at(float(grid[k + 2])) if k + 2 < len(grid) else None)
            mail, hold = parts(Between(outside, own, "bracket", "margins"), rows)
        if values is None:
            values = np.empty((len(margins), mail.shape[-1]))
        if not bounds:
            values[rows] = mail - hold[:, None]
            continue
        # (above, below) of each: the value of mailing lies in [below_mail - above_hold, above_mail - below_hold].
        values[rows] = 0.5 * ((mail[0] + mail[1]) - (hold[0] + hold[1])[:, None])
        width = 0.5 * (mail[0] - mail[1] + (hold[0] - hold[1])[:, None]).max(axis=1)
        bound[rows] = width
        if not refine:
            continue
        failing = width > np.maximum(absolute, relative * np.abs(values[rows]).min(axis=1))
        middle = _middle(low, high, grid)
        if not failing.any() or not (low < middle < high) or high - low <= SMALLEST_SPLIT * max(abs(low), abs(high), 1.0):
            continue
        again = rows[failing]
        left = margins[again] < middle
        # Right half first onto the stack, so the left half is refined first.
        pending.append((k, middle, high, again[~left]))
        pending.append((k, low, middle, again[left]))
    return OwnMarginValues(values, bound, tuple(order))


TAIL_SHARE = 0.005
"""The grid's core spans the customers' margins from this quantile to one less it; each tail beyond gets two margins."""


def _room(program: Program, at_once: int) -> tuple[int, bool]:
    """After the first program: how many programs to keep (up to :data:`KEPT_PROGRAMS`) and whether one more may be
    solved ahead, in the free memory; a grid whose ``at_once`` programs would not fit is refused."""
    tables = program.after_purchase + program.hold_throughout + (program.after_purchase_slope or []) + (program.hold_throughout_slope or [])
    size = sum(table.nbytes for table in tables)
    free = available_memory()
    if (at_once - 1) * size > free:
        raise InputError(
            f"valuing each customer at their own order value reads {at_once} stop-rule programs at once, {gigabytes(size)} each, and "
            f"{gigabytes(free)} is free beside the first; lower horizon_quarters in the policy, use a shorter history (--as-of), "
            "or run on a larger machine"
        )
    kept = max(at_once, min(KEPT_PROGRAMS, int(free // size) + 1))
    return kept, kept * size <= free


def margin_grid(margins: np.ndarray, count: int) -> np.ndarray:
    """About ``count`` margins: ``count - 4`` over the core of the customers' margins (the 0.5% to 99.5% quantiles),
    evenly spaced in ``log(m - core_low + scale)`` with scale a 64th of the core's width (about evenly in ratio, and
    evenly in m near the core's low end), and two in each tail: its end and its middle (the geometric middle of a
    positive upper tail)."""
    lowest, highest = float(margins.min()), float(margins.max())
    low, high = (float(q) for q in np.quantile(margins, [TAIL_SHARE, 1.0 - TAIL_SHARE]))
    scale = max((high - low) / 64.0, 1e-9 * max(abs(low), abs(high), 1.0))
    core = np.exp(np.linspace(math.log(scale), math.log(high - low + scale), max(count - 4, 2))) - scale + low
    upper = math.sqrt(high * highest) if high > 0 else 0.5 * (high + highest)
    return np.unique(np.concatenate([[lowest, 0.5 * (lowest + low)], core, [upper, highest]]))


def _middle(low: float, high: float, grid: np.ndarray) -> float:
    """The middle of an interval in the grid's own spacing (log of the margin above the grid's lowest, plus scale)."""
    lowest, scale = grid[0], (grid[-1] - grid[0]) / 64.0
    return float(math.exp(0.5 * (math.log(low - lowest + scale) + math.log(high - lowest + scale))) - scale + lowest)

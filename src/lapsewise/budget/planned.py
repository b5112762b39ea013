"""Each customer's expected orders and DERT under the stop rule's own plan, beside the mail-every-quarter figures.

``score`` reports, per customer, the expected orders in the next T quarters and
the DERT if the customer were mailed every quarter. For a customer the stop rule
would stop, that overstates both. Here the same two figures are taken under the
plan the program makes (:func:`~lapsewise.decide.decisions.planned_orders`):
mail or hold this quarter, the silent quarters' plan that choice came with, and
after an order the program's plan from there, over the policy's
``horizon_quarters``. The orders are counted by the program's weighted tables
(an order e quarters on weighs 1 for e <= T for the window, the score's discount
factor for the DERT), exactly for the plan at the margin the program is solved at.

Each customer's plan is taken at the nearest margin of the grid the values use
(:func:`~lapsewise.decide.own_margins.own_margin_values`' grid; each distinct
margin exactly when there are few). Like the program, the plan treats every
quarter as an average one when the model has seasons.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from lapsewise.budget.values import margin_states, value_chances
from lapsewise.data.histories import compress
from lapsewise.data.panel import Panel
from lapsewise.data.summary import summarize
from lapsewise.decide.decisions import planned_orders
from lapsewise.decide.own_margins import GRID_MARGINS, margin_grid
from lapsewise.decide.program import check_unmailed_purchases, decision_process, solve_with
from lapsewise.errors import InputError
from lapsewise.files.policy_file import Policy
from lapsewise.model.fitted import Model
from lapsewise.model.posterior import posterior


@dataclass(frozen=True)
class PlannedTotals:
    """Per customer (in the panel's order): expected orders in the next ``quarters`` quarters and DERT at the quarterly
    rate ``rate``, both under the stop rule's plan over ``horizon`` quarters, and the margins the plans were solved at."""

    expected_orders: np.ndarray
    dert: np.ndarray
    quarters: int
    rate: float
    horizon: int
    margins: tuple[float, ...]


def planned_totals(model: Model, panel: Panel, policy: Policy, quarters: int, quarterly_rate: float) -> PlannedTotals:
    """Expected orders and DERT under the stop rule's own plan, per customer (see the module docstring)."""
    economics = policy.economics
    horizon = economics.horizon_quarters
    if quarters > horizon:
        raise InputError(
            f"--horizon {quarters}: the stop rule's plan looks {horizon} quarters ahead (horizon_quarters in {policy.source}); "
            f"use --horizon {horizon} or fewer, or a longer horizon_quarters"
        )
    process = decision_process(model.churn, economics.unmailed_response, rho_estimable=model.rho_estimable, policy_source=policy.source)
    histories = compress(panel)
    check_unmailed_purchases(model.churn, economics.unmailed_response, histories, policy.source)
    alive = posterior(process, histories).alive_now
    states = margin_states(model.spend, policy, histories, summarize(panel))
    prepared = value_chances(process, policy, states)
    distinct = np.unique(states.margin)
    grid = distinct if len(distinct) <= GRID_MARGINS else margin_grid(states.margin, GRID_MARGINS)
    nearest = _nearest(grid, states.margin)
    elapsed = np.arange(horizon + 1)
    discount = economics.discount ** elapsed
    window = ((elapsed >= 1) & (elapsed <= quarters)) / discount
    residual = (1.0 + quarterly_rate) ** -elapsed / discount
    orders, dert = np.zeros(len(states.margin)), np.zeros(len(states.margin))
    for index in np.unique(nearest):
        rows = np.flatnonzero(nearest == index)
        args = (states.n[rows], states.x[rows], states.b[rows], alive[states.history[rows]])
        counted = solve_with(prepared, float(grid[index]), order_weights=window)
        orders[rows] = planned_orders(counted, counted.slopes(), *args)
        discounted = solve_with(prepared, float(grid[index]), order_weights=residual)
        dert[rows] = planned_orders(discounted, discounted.slopes(), *args)
    return PlannedTotals(orders[states.inverse], dert[states.inverse], quarters, quarterly_rate, horizon, tuple(float(grid[i]) for i in np.unique(nearest)))


def _nearest(grid: np.ndarray, margins: np.ndarray) -> np.ndarray:
    """Each margin's nearest grid margin (its index)."""
    right = np.clip(np.searchsorted(grid, margins), 1, len(grid) - 1)
    left = right - 1
    return np.where(margins - grid[left] <= grid[right] - margins, left, right) if len(grid) > 1 else np.zeros(len(margins), dtype=np.int64)

"""The value of mailing each customer this quarter, per version of the piece, from the stop-rule program.

For every customer the program gives ``value_of_mailing = Q(mail) - Q(hold)``,
which already includes what an order buys in later quarters; with versions, one
value per version. A customer's value depends only on their distinct history
and the spend band of their expected order value, so the work is done once per
distinct (history, band) pair (:func:`valued_states`), one program per band
(the bands sharing its margin-free tables, :func:`value_chances`; then
:func:`~lapsewise.decide.program.solve_with` and :func:`band_values`), and spread back to the customers
(:func:`customer_values`). The stages are pure; which of them run side by side
is the pipeline's business (:mod:`lapsewise.app.pipeline`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from lapsewise.budget.segments import segment_labels
from lapsewise.data.codes import integer_codes
from lapsewise.data.histories import Histories
from lapsewise.data.summary import CustomerSummary
from lapsewise.decide.decisions import hold_now_value, version_mail_value
from lapsewise.decide.order_values import SpendBand, band_index
from lapsewise.decide.program import Chances, Program, chances, program_bytes
from lapsewise.files.policy_file import Policy
from lapsewise.model.posterior import Posterior
from lapsewise.model.process import Process
from lapsewise.model.spend import SpendFit, expected_order_value
from lapsewise.model.uncertainty import RANGE


@dataclass(frozen=True)
class CustomerValues:
    """Per-customer inputs of the plan and the mail list.

    ``values`` has one column per version: ``Q(mail with the version) - Q(hold)`` in
    currency units; ``p_buy`` the chance of an order next quarter if mailed with the
    full piece.
    """

    customer_ids: np.ndarray
    segment: np.ndarray
    p_alive: np.ndarray
    p_buy: np.ndarray
    values: np.ndarray
    suppressed: np.ndarray
    versions: tuple[str, ...]
    responses: np.ndarray
    spread: np.ndarray | None = None

    @property
    def suppressed_count(self) -> int:
        return int(self.suppressed.sum())

    @property
    def draws(self) -> int:
        """How many draws of the parameters the values average over (0: valued at the estimates)."""
        return 0 if self.spread is None else self.spread.shape[0]

    def value_range(self, version_index: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Each customer's 5th and 95th percentile of the value of mailing the given version, over the draws."""
        rows = np.arange(len(version_index))
        low, high = np.quantile(self.spread[:, rows, version_index], RANGE, axis=0)
        centre = self.values[rows, version_index]
        return centre + low, centre + high

    def drawn_offsets(self, assignment: np.ndarray) -> np.ndarray:
        """Per draw, how far the summed value of mailing the assigned versions lies from the summed ``values``."""
        mailed = np.flatnonzero(assignment >= 0)
        return self.spread[:, mailed, assignment[mailed]].astype(np.float64).sum(axis=1)


def reference_piece_cost(policy: Policy) -> float:
    """The piece cost of the full piece that later quarters are valued with: a version with response 1, else economics piece_cost."""
    full = [v.piece_cost for v in policy.versions if v.response == 1.0]
    return min(full) if full else policy.economics.piece_cost


def customer_order_values(spend: SpendFit | None, policy: Policy, summary: CustomerSummary) -> np.ndarray:
    """Each customer's expected order value: the policy's fixed one, or the spend model's given their history."""
    if policy.economics.order_value is not None:
        return np.full(len(summary.x), policy.economics.order_value)
    return expected_order_value(spend, summary.x, summary.mean_repeat_value)


@dataclass(frozen=True)
class ValuedStates:
    """The distinct (history, spend band) pairs to value, their program states, and each customer's pair.

    ``history`` and ``band`` index the pair's history and spend band; ``n``, ``x``, ``b``
    are its program state (quarters observed, repeat purchases, unmailed silent quarters).
    """

    history: np.ndarray
    band: np.ndarray
    n: np.ndarray
    x: np.ndarray
    b: np.ndarray
    inverse: np.ndarray

    def in_band(self, index: int) -> np.ndarray:
        return self.band == index


def valued_states(histories: Histories, bands: tuple[SpendBand, ...], order_values: np.ndarray) -> ValuedStates:
    """Compress customers into distinct (history, spend band) pairs."""
    key = histories.inverse * len(bands) + band_index(bands, order_values)
    distinct, inverse = integer_codes(key, histories.size * len(bands))
    history = distinct // len(bands)
    return ValuedStates(
        history=history,
        band=distinct % len(bands),
        n=histories.n[history],
        x=histories.x[history],
        b=histories.unmailed_quarters[history],
        inverse=inverse.ravel(),
    )


def _band_extent(states: ValuedStates, members: np.ndarray) -> dict[str, int]:
    """The range of program states a band's members occupy."""
    return {
        "n_max": int(states.n[members].max()),
        "b_max": int(states.b[members].max()),
        "n_min": int(states.n[members].min()),
        "x_max": int(states.x[members].max()),
    }


def value_chances(process: Process, policy: Policy, states: ValuedStates, members: np.ndarray, budget_price: float = 0.0) -> Chances:
    """The margin-free part of the stop-rule program (:func:`~lapsewise.decide.program.chances`) for the states of
    ``members`` (one band, or several whose programs then share it).

    Later quarters' pieces cost the full piece's cost plus ``budget_price``, the shadow price of a budget that
    binds every quarter (0: the budget is this quarter's alone).
    """
    economics = policy.economics
    future_piece = reference_piece_cost(policy) + budget_price
    return chances(process, future_piece, economics.discount, economics.horizon_quarters, **_band_extent(states, members))



def band_program_bytes(process: Process, policy: Policy, states: ValuedStates, members: np.ndarray) -> int:
    """The memory one band's program takes for these members (its tables and recursion, as if not shared)."""
    return program_bytes(policy.economics.horizon_quarters, rho=float(process.rho), **_band_extent(states, members))


def band_values(program: Program, policy: Policy, states: ValuedStates, members: np.ndarray, alive: np.ndarray) -> np.ndarray:
    """The value of mailing each version this quarter at the members' states, (members, versions).

    ``alive`` is each member's chance of being alive through quarter n. After this
    quarter a customer is valued as if mailed with the full piece (response 1).
    """
    args = (states.n[members], states.x[members], states.b[members], alive)
    hold = hold_now_value(program, *args)
    return np.column_stack([version_mail_value(program, *args, v.response, v.piece_cost) - hold for v in policy.versions])


def averaged_values(point: np.ndarray, drawn: list[np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    """The mean of the drawn values, and each draw's difference from it (draws, customers, versions; float32).

    The mean is taken as ``point`` plus the mean of the draws' differences from
    ``point`` (the same number, rounded less), so draws that all equal the point
    values give the point values exactly.
    """
    offsets = np.stack([values - point for values in drawn]).astype(np.float32)
    shift = offsets.mean(axis=0, dtype=np.float64)
    return point + shift, offsets - shift.astype(np.float32)[None]


def customer_values(
    customer_ids: np.ndarray,
    summary: CustomerSummary,
    policy: Policy,
    histories: Histories,
    post: Posterior,
    values: np.ndarray,
    suppressed: np.ndarray | None = None,
    attribute: np.ndarray | None = None,
    spread: np.ndarray | None = None,
) -> CustomerValues:
    """The customers' values (customers, versions), with the posterior of the distinct histories spread back to them."""
    return CustomerValues(
        customer_ids=customer_ids,
        segment=segment_labels(summary, policy.segments, attribute),
        p_alive=post.p_alive[histories.inverse],
        p_buy=post.p_buy[histories.inverse],
        values=values,
        suppressed=np.zeros(len(customer_ids), dtype=bool) if suppressed is None else suppressed,
        versions=tuple(v.name for v in policy.versions),
        responses=np.array([v.response for v in policy.versions]),
        spread=spread,
    )

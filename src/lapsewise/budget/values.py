"""The value of mailing each customer this quarter, per version of the piece, from the stop-rule program.

For every customer the program gives ``value_of_mailing = Q(mail) - Q(hold)``,
which already includes what an order buys in later quarters; with versions, one
value per version. A customer's value depends only on their distinct history
and their margin per order (from their own expected order value), so the work is
done once per distinct (history, margin) pair (:func:`valued_states`), at each
pair's own margin from programs solved at a few margins that share their
margin-free tables (:func:`value_chances`, :func:`state_values`), and spread back
to the customers (:func:`customer_values`). The stages are pure; which of them run side by side
is the pipeline's business (:mod:`lapsewise.app.pipeline`).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np

from lapsewise.budget.segments import segment_labels
from lapsewise.data.histories import Histories
from lapsewise.data.summary import CustomerSummary
from lapsewise.decide.decisions import hold_now_value, version_mail_value
from lapsewise.decide.order_values import typical_order_value
from lapsewise.decide.own_margins import OwnMarginValues, own_margin_values
from lapsewise.decide.program import Chances, chances
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
    precision: ValuePrecision | None = None

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
    """Each customer's expected order value: the policy's fixed one, or the spend model's given their history
    (a model without a usable order-value model is refused)."""
    if policy.economics.order_value is not None:
        return np.full(len(summary.x), policy.economics.order_value)
    typical_order_value(spend, policy.economics)
    return expected_order_value(spend, summary.x, summary.mean_repeat_value)


@dataclass(frozen=True)
class ValuedStates:
    """The distinct (history, margin) pairs to value, their program states, and each customer's pair.

    ``history`` indexes the pair's history and ``margin`` is its margin per order
    (from the customer's own expected order value); ``n``, ``x``, ``b`` are its
    program state (quarters observed, repeat purchases, unmailed silent quarters).
    """

    history: np.ndarray
    margin: np.ndarray
    n: np.ndarray
    x: np.ndarray
    b: np.ndarray
    inverse: np.ndarray


def valued_states(histories: Histories, margins: np.ndarray) -> ValuedStates:
    """Compress customers into distinct (history, margin) pairs: one sort by history, then margin."""
    margins = np.asarray(margins, dtype=float)
    order = np.lexsort((margins, histories.inverse))
    history, margin = histories.inverse[order], margins[order]
    new = np.ones(len(order), dtype=bool)
    new[1:] = (history[1:] != history[:-1]) | (margin[1:] != margin[:-1])
    inverse = np.empty(len(order), dtype=np.int64)
    inverse[order] = np.cumsum(new) - 1
    history, margin = history[new], margin[new]
    return ValuedStates(
        history=history,
        margin=margin,
        n=histories.n[history],
        x=histories.x[history],
        b=histories.unmailed_quarters[history],
        inverse=inverse,
    )


def margin_states(spend: SpendFit | None, policy: Policy, histories: Histories, summary: CustomerSummary) -> ValuedStates:
    """The distinct (history, margin) states of the customers, each at the margin of their own expected order value."""
    return valued_states(histories, policy.economics.margin(customer_order_values(spend, policy, summary)))


def value_chances(process: Process, policy: Policy, states: ValuedStates, budget_price: float = 0.0) -> Chances:
    """The margin-free part of the stop-rule program (:func:`~lapsewise.decide.program.chances`) for these states,
    shared by the programs at every margin.

    Later quarters' pieces cost the full piece's cost plus ``budget_price``, the shadow price of a budget that
    binds every quarter (0: the budget is this quarter's alone).
    """
    economics = policy.economics
    future_piece = reference_piece_cost(policy) + budget_price
    return chances(
        process, future_piece, economics.discount, economics.horizon_quarters,
        n_max=int(states.n.max()), b_max=int(states.b.max()), n_min=int(states.n.min()), x_max=int(states.x.max()),
    )


def state_value_parts(program, policy: Policy, states: ValuedStates, rows: np.ndarray, alive: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """At the given states: the value of mailing each version this quarter (rows, versions) and of holding (rows,)
    (each with a first axis of two, the bounds from above and below, from a Between's bracket).

    ``alive`` is each row's chance of being alive through quarter n. After this quarter a customer is valued as
    if mailed with the full piece (response 1). ``program`` is a Program (every row at its margin) or a
    :class:`~lapsewise.decide.decisions.Between` (each row at its own margin).
    """
    args = (states.n[rows], states.x[rows], states.b[rows], alive)
    hold = hold_now_value(program, *args)
    return np.stack([version_mail_value(program, *args, v.response, v.piece_cost) for v in policy.versions], axis=-1), hold


def state_values(prepared: Chances, policy: Policy, states: ValuedStates, alive: Callable[[], np.ndarray], **grid) -> OwnMarginValues:
    """Every state's value of mailing each version at its own margin (:func:`~lapsewise.decide.own_margins.own_margin_values`,
    which takes ``grid``'s keywords).

    ``alive()`` gives every state's chance of being alive through quarter n; it is asked for only once the first
    program is solved, so that the posterior can be computed beside it.
    """
    return own_margin_values(prepared, states.margin, lambda program, rows: state_value_parts(program, policy, states, rows, alive()[states.history[rows]]), **grid)


@dataclass(frozen=True)
class ValuePrecision:
    """How close the values at the estimates are to programs solved at each customer's own order value.

    ``programs``: margins solved; ``certified``: share of customers whose every value of mailing is proved within
    1% (or 0.01 currency units, whichever is larger) of such a solve; ``largest_bound``: the largest proved
    distance (currency units); ``refined``: the grid was refined until every value was certified (with draws, every
    draw's too); ``draw_margins``: with draws and no refining, the margins each draw's difference from the estimates'
    values is read between (None otherwise).
    """

    programs: int
    certified: float
    largest_bound: float
    refined: bool
    draw_margins: int | None = None

    @classmethod
    def of(cls, valued: OwnMarginValues, inverse: np.ndarray, refined: bool, draw_margins: int | None = None) -> "ValuePrecision":
        counts = np.bincount(inverse, minlength=len(valued.bound))
        certified = float(counts[valued.certified()].sum() / max(counts.sum(), 1))
        return cls(valued.solved, certified, float(np.max(valued.bound)) if len(valued.bound) else 0.0, refined, draw_margins)

    def to_dict(self) -> dict:
        return {
            "programs": self.programs, "certified_share": round(self.certified, 6), "largest_bound": round(self.largest_bound, 6),
            "refined": self.refined, "draw_margins": self.draw_margins,
        }


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
    precision: "ValuePrecision | None" = None,
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
        precision=precision,
    )

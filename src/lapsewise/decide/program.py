"""The stop-rule program: the belief-state dynamic program that values every customer state after a purchase.

The decision is made at the start of each quarter: mail (pay the piece cost
``c``) or hold. A customer who buys earns the margin ``m = gross_margin *
order_value - order_cost``. A quarter ``i`` quarters ahead is discounted by
``d ** i`` with ``d = (1 + annual_discount_rate) ** -0.25``; its cost and margin
carry the same factor.

The state is the exact posterior of the hidden-churn model given the history.
Two facts make it small:

* given that a customer is alive through quarter ``n``, the future depends only
  on ``(n, x, b)``: churn ``theta ~ Beta(gamma, delta + n)`` and purchase
  probability ``p`` with density proportional to
  ``Beta(alpha, beta) * p^x (1-p)^a (1-rho p)^b`` where ``a = n - x - b`` mailed
  and ``b`` unmailed silent quarters;
* a customer who just bought is certainly alive, so after a purchase the
  state is exactly ``(n, x, b)``. Between purchases the firm sees only
  silence, so its decisions form a fixed sequence, and the belief is the
  alive state weighted by ``P(alive)``.

The recursion
-------------
Write ``M(x, a, b) = E[p^x (1-p)^a (1-rho p)^b]`` (:mod:`lapsewise.model.moments`)
and ``S(n, i) = B(gamma, delta + n + i) / B(gamma, delta + n)``, the chance that a
customer alive through quarter n is still alive i quarters later. Along a silent
stretch in which every quarter is mailed, from a customer who bought in quarter
n in state ``(n, x, b)``, the chance of the first purchase in the i-th quarter
and of being alive and silent after i quarters are::

    f_i(n, x, b) = S(n, i) M(x + 1, a + i - 1, b) / M(x, a, b)
    s_i(n, x, b) = S(n, i) M(x, a + i, b) / M(x, a, b)

and in a held quarter the chance of an (unprompted) purchase and of silence::

    g(n, x, b) = rho S(n, 1) M(x + 1, a, b) / M(x, a, b)
    q(n, x, b) =     S(n, 1) M(x, a, b + 1) / M(x, a, b)

With ``h`` quarters left, ``W_h(n, x, b)`` is the value right after a purchase
and ``H_h(n, x, b)`` the value of holding for all h quarters (for a customer
alive through n)::

    W_h = max over J = 0..h of   sum_{i=1..J} d^i [ f_i (m + W_{h-i}(n+i, x+1, b)) - c (1 - sum_{l<i} f_l) ]
                               + d^J s_J H_{h-J}(n+J, x, b)

    H_h = d [ g (m + W_{h-1}(n+1, x+1, b)) + q H_{h-1}(n+1, x, b+1) ]

    W_0 = H_0 = 0

The plan behind ``J`` is "mail J quarters, then hold" (``s_0 = 1``): a piece is
paid for in quarter i unless the customer has bought before it (``1 - sum f_l``),
and after a purchase the program starts again from the new post-purchase state.
With ``rho = 0`` these plans are exactly the stopping rules; with ``rho > 0`` a plan
that holds before it mails is not in the class. :mod:`lapsewise.decide.decisions`
turns the tables into decisions at silent states; :mod:`lapsewise.decide.reference`
evaluates the same recursion state by state, slowly, for the tests.

References
----------
Bitran, G. R., & Mondschein, S. V. (1996). Mailing Decisions in the Catalog Sales
Industry. Management Science, 42(9), 1364-1381.

Simester, D. I., Sun, P., & Tsitsiklis, J. N. (2006). Dynamic Catalog Mailing
Policies. Management Science, 52(5), 683-696.
"""

from __future__ import annotations

import dataclasses
import os
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

import numpy as np

from lapsewise.data.histories import Histories
from lapsewise.errors import InputError
from lapsewise.machine import available_memory, gigabytes
from lapsewise.model.churn import ChurnFit
from lapsewise.model.moments import log_alive_ahead, log_moment_grid
from lapsewise.model.process import Process


def planning_process(fit: ChurnFit, unmailed_response: float | None = None, *, rho_estimable: bool = True, policy_source: str = "the policy") -> Process:
    """The fitted process as the programs plan against it: rho is a number, the seasons kept.

    ``unmailed_response`` (the policy's) overrides rho; without it and without a
    mailing history a held customer is assumed not to buy (rho 0). A model fitted on
    a mailings file that mailed every customer every quarter has no rho
    (``rho_estimable`` False): nothing showed how a held customer orders, so the
    policy must say (``policy_source`` names it in the refusal).
    """
    if not rho_estimable and fit.rho is None and unmailed_response is None:
        raise InputError(
            f"{policy_source or 'the policy'}: unmailed_response is required: the model's mailings file mailed every customer every quarter, "
            "so rho (the response without a piece) could not be estimated; set it (0 to 1) under [economics] or pass --unmailed-response"
        )
    rho = unmailed_response if unmailed_response is not None else (fit.rho if fit.rho is not None else 0.0)
    return dataclasses.replace(fit.process, rho=float(rho))


SEASON_SUPPORT = 2.0
"""Standard errors by which some quarter's multiplier must differ from 1 for the calendar program to follow the seasons."""
SEASON_MATTERS = 0.05
"""And by how much at least: a quarter 5% slower than the peak. At a million customers the standard errors are a few
thousandths, and seasons that flat would cost the calendar program's time for nothing a mail plan would notice."""


def seasons_supported(fit: ChurnFit) -> bool:
    """Whether the model's seasons are worth following: some quarter's multiplier is at least 5% from 1 and more
    than two standard errors from it (a Wald check per quarter; with no standard errors, the 5% alone)."""
    if fit.seasons is None:
        return False
    errors = [fit.std_errors.get(f"season_{q + 1}") for q in range(4)]
    return any(
        abs(1.0 - s) >= SEASON_MATTERS and (e is None or abs(1.0 - s) > SEASON_SUPPORT * e)
        for s, e in zip(fit.seasons, errors)
    )


def decision_process(fit: ChurnFit, unmailed_response: float | None = None, *, rho_estimable: bool = True, policy_source: str = "the policy") -> Process:
    """:func:`planning_process` with every quarter alike, as the single-piece program plans.

    With seasons it plans with the purchase probability of an average quarter: ``s_bar p``
    with ``s_bar`` the mean multiplier, approximated by ``Beta(alpha, beta')`` with the same mean,
    ``beta' = (alpha + beta) / s_bar - alpha`` (the same spread of p across customers,
    shifted to the average quarter). An approximation: the calendar program
    (:mod:`lapsewise.decide.calendar`) follows the quarters instead.
    """
    process = planning_process(fit, unmailed_response, rho_estimable=rho_estimable, policy_source=policy_source)
    beta = fit.beta
    if process.seasonal:
        mean_season = sum(fit.seasons) / 4.0
        beta = (fit.alpha + fit.beta) / mean_season - fit.alpha
    return Process(fit.alpha, beta, fit.gamma, fit.delta, process.rho)


def check_unmailed_purchases(fit: ChurnFit, unmailed_response: float | None, histories: Histories, policy_source: str) -> None:
    """Refuse a response of 0 to holding that the data contradict: customers who ordered in unmailed quarters.

    With rho 0 such a history has probability 0, so every figure about it would be
    NaN. The message names where the 0 comes from: the policy's ``unmailed_response``,
    or a model fitted without a mailings file (which assumes held customers never order).
    """
    if decision_process(fit, unmailed_response).rho > 0:
        return
    customers = int(histories.count[histories.x_unmailed > 0].sum())
    if customers == 0:
        return
    evidence = f"{customers:,} customers ordered in quarters in which the mailings file shows no piece"
    if unmailed_response is not None:
        raise InputError(
            f"{policy_source}: unmailed_response = 0 says a customer who is not mailed never orders, but {evidence}; "
            "raise unmailed_response, or remove it to use the model's estimate"
        )
    raise InputError(
        f"the model was fitted without a mailings file, so a customer who is not mailed is taken never to order, but {evidence}; "
        "fit the model again with --mailings, or set unmailed_response in the policy"
    )


@dataclass(frozen=True)
class Program:
    """The solved tables ``W_h`` and ``H_h`` of the recursion in the module docstring.

    ``after_purchase_at(h, b, x, n)`` is ``W_h(n, x, b)``: the value, at the end of
    quarter n, of a customer who bought in quarter n with x repeat purchases and b
    unmailed silent quarters behind them, when h quarters are left to decide.
    ``hold_throughout_at(h, b, x, n)`` is ``H_h(n, x, b)``. ``log_moment[b, x, n]`` is
    ``log M(x, a, b)`` with ``a = n - x - b`` (minus infinity off the grid) and
    ``log_alive[n, i]`` is ``log S(n, i)``.

    Layout: the tables are indexed ``[b, x, n]`` with n last, the dimension every
    step of the recursion shifts along, so its slices are contiguous. With h
    quarters left only a band of n can be reached from the states the program was
    solved for, so ``after_purchase[h]`` and ``hold_throughout[h]`` hold that band
    alone: their column ``j`` is quarter ``first_n[h] + j``.
    """

    process: Process
    margin: float
    piece_cost: float
    discount: float
    horizon: int
    log_moment: np.ndarray
    log_alive: np.ndarray
    after_purchase: list[np.ndarray]
    hold_throughout: list[np.ndarray]
    first_n: tuple[int, ...]
    after_purchase_slope: list[np.ndarray] | None = None
    hold_throughout_slope: list[np.ndarray] | None = None
    slope_weights: np.ndarray | None = None
    order_weights: np.ndarray | None = None

    @property
    def rho(self) -> float:
        return float(self.process.rho)

    def slopes(self) -> "Program":
        """The program of the chosen plans' weighted orders (solved with ``slopes=True`` or ``order_weights``).

        Every table is the best plan's value ``m * orders - pieces``; its slope in m
        is the plan's discounted orders, so the slope tables follow the recursion
        with margin 1 and piece cost 0 on the chosen plans. Anything the decisions
        build from the tables, read in this program, is its slope in m. With
        ``order_weights`` (kept as ``slope_weights``) the margin of an order e quarters
        after the decision is ``order_weights[e]`` instead of 1 (:meth:`order_weight`).
        """
        if self.after_purchase_slope is None:
            raise ValueError("the program was solved without slopes")
        return dataclasses.replace(
            self, margin=1.0, piece_cost=0.0, after_purchase=self.after_purchase_slope, hold_throughout=self.hold_throughout_slope,
            after_purchase_slope=None, hold_throughout_slope=None, slope_weights=None, order_weights=self.slope_weights,
        )

    def order_weight(self, elapsed: int) -> float:
        """The margin of an order ``elapsed`` quarters after the decision (at ``horizon`` quarters left)."""
        return self.margin if self.order_weights is None else float(self.order_weights[elapsed])

    def after_purchase_at(self, h: int, b, x, n) -> np.ndarray:
        """``W_h(n, x, b)``."""
        return self.after_purchase[h][b, x, self._column(h, n)]

    def hold_throughout_at(self, h: int, b, x, n) -> np.ndarray:
        """``H_h(n, x, b)``."""
        return self.hold_throughout[h][b, x, self._column(h, n)]

    def _column(self, h: int, n) -> np.ndarray:
        """Where quarter n lies in the tables for h quarters left; a state the program cannot reach is an error."""
        column = np.asarray(n) - self.first_n[h]
        width = self.after_purchase[h].shape[2]
        if column.size and (column.min() < 0 or column.max() >= width):
            raise ValueError(f"quarter n outside {self.first_n[h]}..{self.first_n[h] + width - 1}, "
                             f"the states solved for with {h} quarters left; solve with a wider n_min..n_max")
        return column


def one_quarter_chance(log_moment: np.ndarray, log_alive: np.ndarray, shift_x: int, shift_b: int) -> np.ndarray:
    """``S(n, 1) M(next state) / M(state now)`` on the whole ``[b, x, n]`` grid (0 where the state does not exist).

    The next state is ``(n + 1, x + shift_x, b + shift_b)``: with ``shift_x = 1`` the
    chance of a purchase when mailed (``f_1``; times rho when held, ``g``); with both
    shifts 0 the chance of being alive and silent after a mailed quarter (``s_1``);
    with ``shift_b = 1`` alive and silent after a held quarter (``q``).
    """
    depth, columns, rows = log_moment.shape
    here = log_moment[: depth - shift_b, : columns - shift_x, : rows - 1]
    there = log_moment[shift_b:, shift_x:, 1:]
    with np.errstate(invalid="ignore"):
        ratio = np.exp(log_alive[None, None, : rows - 1, 1] + there - here)
    out = np.zeros_like(log_moment)
    out[: depth - shift_b, : columns - shift_x, : rows - 1] = np.where(np.isfinite(here), ratio, 0.0)
    return out


def _times_shifted(table: np.ndarray, factor: np.ndarray, quarters: int, out: np.ndarray) -> np.ndarray:
    """``table`` times ``factor`` read ``quarters`` later along n (zero beyond the grid), into ``out`` (which may be ``table``)."""
    rows = table.shape[2] - quarters
    np.multiply(table[:, :, :rows], factor[:, :, quarters:], out=out[:, :, :rows])
    out[:, :, rows:] = 0.0
    return out


B_BLOCKS = 4
"""Blocks of b in the recursion's inner loop: each skips the (b, x) corner where no state is reached."""


def workers() -> ThreadPoolExecutor:
    """Two worker threads (one on a single core): the kernels' numpy operations release the GIL."""
    return ThreadPoolExecutor(max_workers=min(2, os.cpu_count() or 1))


@dataclass(frozen=True)
class _Reach:
    """The states reachable with h quarters left: n from ``first`` to ``last``, x up to ``x_last``, b up to ``b_last``."""

    first: int
    last: int
    x_last: int
    b_last: int


def program_bytes(horizon: int, n_max: int, b_max: int, n_min: int = 0, x_max: int | None = None, rho: float = 0.5) -> int:
    """The memory :func:`solve` takes for these arguments, in bytes: its grids, its tables per quarter ahead, and W and H.

    It grows with the fourth power of the horizon (the grid's three sides and the
    number of tables all grow with it), which is what makes a long horizon costly.
    """
    b_grid = b_max + 1 + (horizon if rho > 0 else 0)
    n_grid = n_max + horizon + 1
    x_top = n_max if x_max is None else x_max
    depth, columns, rows = b_grid + 2, min(n_grid + 3, x_top + horizon + 4), n_grid + 2
    grid = depth * columns * rows
    cells = grid * (3 + (2 if rho > 0 else 0)) + 5 * depth * columns * (rows - n_min)
    for i in range(1, horizon + 1):
        h = min(i, horizon - 1)
        b_last = min(b_max + horizon - h + 1, depth - 2) if rho > 0 else depth - 2
        last = n_max + horizon - h
        x_last = min(last + 1, x_top + horizon - h + 1)
        cells += (4 + (rho > 0)) * (b_last + 1) * (x_last + 1) * (last + 1 - n_min)  # d^i f_i, orders, pieces, K_i (d^i s_i)
    cells += 2 * horizon * depth * columns * (n_max - n_min + 2)
    return 8 * cells


def check_program_memory(size: int, horizon: int, n_max: int) -> None:
    """Refuse, before any work, a program that would not fit in the memory this machine has free."""
    free = available_memory()
    if size > free:
        raise InputError(
            f"the stop-rule program looking {horizon} quarters ahead for customers observed for up to {n_max} quarters needs "
            f"about {gigabytes(size)} of memory and {gigabytes(free)} is free; lower horizon_quarters in the policy (the memory "
            "grows with the fourth power of horizon plus history), use a shorter history (--as-of, or drop the oldest orders), "
            "or run on a larger machine"
        )


@dataclass(frozen=True)
class Chances:
    """The part of the program that does not depend on the margin, shared by the programs of several order values.

    For i = 1..horizon, on the states reachable with i or more quarters left: ``purchase_after[i]`` is ``d^i f_i``,
    ``silent_after[i]`` is ``d^i s_i`` (rho > 0 only), ``orders_ahead[i]`` is ``sum_{l<=i} d^l f_l`` and
    ``pieces_ahead[i]`` is ``c sum_{l<=i} d^l (1 - sum_{k<l} f_k)``, so that the plans' margins and costs are
    ``K_i = m orders_ahead[i] - pieces_ahead[i]`` at any margin m. ``held_buy`` and ``held_silent`` are ``g`` and
    ``q`` on the whole grid (None with rho 0). Built by :func:`chances`, used by :func:`solve_with`.
    """

    process: Process
    piece_cost: float
    discount: float
    horizon: int
    n_max: int
    b_max: int
    n_min: int
    x_top: int
    log_moment: np.ndarray
    log_alive: np.ndarray
    purchase_after: list
    silent_after: list
    orders_ahead: list
    pieces_ahead: list
    held_buy: np.ndarray | None
    held_silent: np.ndarray | None

    def reach(self, h: int) -> _Reach:
        """The states reachable with h quarters left (see :func:`solve`)."""
        shape = self.log_moment.shape
        b_last = min(self.b_max + self.horizon - h + 1, shape[0] - 2) if self.process.rho > 0 else shape[0] - 2
        last = self.n_max + self.horizon - h
        return _Reach(max(self.n_min + self.horizon - h - 1, 0), last, min(last + 1, self.x_top + self.horizon - h + 1), b_last)


def chances(process: Process, piece_cost: float, discount: float, horizon: int, n_max: int, b_max: int, n_min: int = 0, x_max: int | None = None) -> Chances:
    """The margin-free tables of :func:`solve` for these states (its arguments less the margin).

    ``f_i`` and ``s_i`` are products of one-quarter chances along n, built up over i in running tables updated in
    place; the i-th tables keep only the states reachable with i or more quarters left. Their columns start at
    ``n_min`` (the first n reachable with at most horizon - 1 quarters left): column j is quarter n_min + j.
    """
    rho = float(process.rho)
    check_program_memory(program_bytes(horizon, n_max, b_max, n_min, x_max, rho), horizon, n_max)
    # Held quarters add to b; with rho = 0 nothing is learnt from them but n still grows.
    b_grid = b_max + 1 + (horizon if rho > 0 else 0)
    n_grid = n_max + horizon + 1
    x_top = n_max if x_max is None else x_max
    # x never exceeds the largest x asked about plus one per quarter ahead (and one more for x + 1).
    log_moment = log_moment_grid(process, n_grid + 1, b_grid + 1, x_top + horizon + 3)
    log_alive = log_alive_ahead(process.gamma, process.delta, log_moment.shape[2], horizon + 1)
    tables = Chances(process, piece_cost, discount, horizon, n_max, b_max, n_min, x_top, log_moment, log_alive, [None], [None], [None], [None], None, None)
    mailed_buy = one_quarter_chance(log_moment, log_alive, 1, 0)  # f_1
    mailed_silent = one_quarter_chance(log_moment, log_alive, 0, 0)  # s_1
    later = (slice(None), slice(None), slice(n_min, None))
    no_purchase_yet = np.ones_like(log_moment[later])  # 1 - sum_{l<i} f_l
    orders, pieces = np.zeros_like(no_purchase_yet), np.zeros_like(no_purchase_yet)
    still_silent = np.ones_like(no_purchase_yet)  # s_{i-1}
    first_purchase = np.empty_like(no_purchase_yet)  # f_i
    scratch = np.empty_like(no_purchase_yet)
    for i in range(1, horizon + 1):
        kept_reach = tables.reach(min(i, horizon - 1))
        kept = (slice(0, kept_reach.b_last + 1), slice(0, kept_reach.x_last + 1), slice(0, kept_reach.last + 1 - n_min))
        _times_shifted(still_silent, mailed_buy[later], i - 1, first_purchase)  # f_i = s_{i-1} f_1(n + i - 1)
        np.multiply(first_purchase, discount**i, out=scratch)
        orders += scratch
        np.multiply(no_purchase_yet, discount**i * piece_cost, out=scratch)
        pieces += scratch
        no_purchase_yet -= first_purchase
        tables.purchase_after.append(first_purchase[kept] * discount**i)
        tables.orders_ahead.append(orders[kept].copy())
        tables.pieces_ahead.append(pieces[kept].copy())
        _times_shifted(still_silent, mailed_silent[later], i - 1, still_silent)  # s_i = s_{i-1} s_1(n + i - 1)
        if rho > 0:
            tables.silent_after.append(still_silent[kept] * discount**i)
    if rho > 0:
        tables = dataclasses.replace(tables, held_buy=rho * mailed_buy, held_silent=one_quarter_chance(log_moment, log_alive, 0, 1))  # g, q
    return tables


def solve(
    process: Process,
    margin: float,
    piece_cost: float,
    discount: float,
    horizon: int,
    n_max: int,
    b_max: int,
    n_min: int = 0,
    x_max: int | None = None,
) -> Program:
    """Solve the tables ``W_h`` and ``H_h`` of the module docstring's recursion for h = 0..horizon-1.

    ``n_min``, ``n_max``, ``x_max`` and ``b_max`` bound the states the caller will
    decide at; the grid reaches ``horizon`` quarters beyond them. With h quarters
    left only the states that can be reached with h left are computed: n from
    ``n_min + horizon - h - 1`` to ``n_max + horizon - h``, x up to
    ``x_max + horizon - h + 1`` and b up to ``b_max + horizon - h + 1``.

    How: the chances ``f_i`` and ``s_i`` and the plans' margins and costs,
    ``K_J = sum_{i<=J} d^i [m f_i - c (1 - sum_{l<i} f_l)]``, do not depend on h, so
    they are tabulated once (:func:`chances`; the margin-free parts of K_J too, so that
    programs at several order values share them, :func:`solve_with`). Then for each h the J-th plan's value is
    ``K_J + sum_{i<=J} d^i f_i W_{h-i}(n+i, x+1, b) + d^J s_J H_{h-J}(n+J, x, b)``,
    built up over J and maximised as it goes, a few numpy operations over the
    reachable part of the grid per (h, J), in blocks of b that two threads share.
    :mod:`lapsewise.decide.reference` computes the same tables state by state.
    """
    return solve_with(chances(process, piece_cost, discount, horizon, n_max, b_max, n_min, x_max), margin)


def solve_with(prepared: Chances, margin: float, slopes: bool = False, order_weights: np.ndarray | None = None) -> Program:
    """:func:`solve` at margin ``margin`` on tables built by :func:`chances` (which may serve several margins).

    With ``slopes`` the program also keeps each table's slope in the margin: the discounted orders of the plan
    chosen at each state (:meth:`Program.slopes`), found beside the values at about twice the work.

    ``order_weights`` (``u_e`` for e = 0..horizon) keeps instead the chosen plans' weighted orders: an order e
    quarters after the decision at ``horizon`` quarters left counts ``d^e u_e``. With h quarters left a table's
    state lies ``e0 = horizon - h`` quarters after the decision, so its orders i quarters on count
    ``u_{e0+i}``, and the tables hold the weighted orders discounted to their own quarter
    (``sum_i d^i f_i (u_{e0+i} + table_{h-i}) + d^J s_J hold_{h-J}`` for the chosen J). ``u_e = w_e / d^e``
    counts each order e quarters on with weight w_e (all ones: the slopes).
    """
    process, discount, horizon, n_min = prepared.process, prepared.discount, prepared.horizon, prepared.n_min
    rho = float(process.rho)
    log_moment = prepared.log_moment
    shape = log_moment.shape
    purchase_after, silent_after = prepared.purchase_after, prepared.silent_after
    if order_weights is not None:
        slopes = True
        order_weights = np.asarray(order_weights, dtype=float)
        if order_weights.shape != (horizon + 1,):
            raise ValueError(f"order_weights needs {horizon + 1} entries (quarters 0 to {horizon} after the decision)")
    uniform = order_weights is None
    known_part = [None] + [margin * orders - pieces for orders, pieces in zip(prepared.orders_ahead[1:], prepared.pieces_ahead[1:])]  # K_i
    held_buy, held_silent = prepared.held_buy, prepared.held_silent
    reach = prepared.reach
    x_top, b_max = prepared.x_top, prepared.b_max
    first_n = [reach(h).first for h in range(horizon)]
    band = prepared.n_max - n_min + 2  # the reachable band of n, the same width for every h
    after_purchase = [np.zeros((shape[0], shape[1], band))]
    hold_throughout = [np.zeros((shape[0], shape[1], band))]
    after_slope = [np.zeros((shape[0], shape[1], band))] if slopes else None
    hold_slope = [np.zeros((shape[0], shape[1], band))] if slopes else None
    with workers() as pool:
        for h in range(1, horizon):
            now = reach(h)

            def at(table: np.ndarray, first: int, i: int = 0, shift_x: int = 0, shift_b: int = 0, rows: tuple[int, int, int] | None = None) -> np.ndarray:
                """The states reachable with h left in ``table`` (whose column 0 is quarter ``first``), ``i`` quarters on
                and shifted in x and b; ``rows`` = (first b, last b + 1, last x + 1) narrows them to a block of b."""
                b0, b1, x1 = rows or (0, now.b_last + 1, now.x_last + 1)
                return table[b0 + shift_b : b1 + shift_b, shift_x : x1 + shift_x, now.first + i - first : now.last + 1 + i - first]

            def solved(tables: list[np.ndarray], i: int, shift_x: int = 0, shift_b: int = 0, rows=None) -> np.ndarray:
                """``at`` in the solved table for h - i quarters left, i quarters on."""
                return at(tables[h - i], first_n[h - i], i, shift_x, shift_b, rows)

            held = np.zeros((shape[0], shape[1], band))
            if rho > 0:
                # H_h = d [g (m + W_{h-1}(n+1, x+1, b)) + q H_{h-1}(n+1, x, b+1)]
                part = at(held, now.first)
                np.add(solved(after_purchase, 1, 1), margin, out=part)
                part *= at(held_buy, 0)
                part += at(held_silent, 0) * solved(hold_throughout, 1, 0, 1)
                part *= discount
            hold_throughout.append(held)
            elapsed = horizon - h  # quarters from the decision to a state with h quarters left
            if slopes:
                held_slope = np.zeros((shape[0], shape[1], band))
                if rho > 0:
                    part = at(held_slope, now.first)
                    np.add(solved(after_slope, 1, 1), 1.0 if uniform else order_weights[elapsed + 1], out=part)
                    part *= at(held_buy, 0)
                    part += at(held_silent, 0) * solved(hold_slope, 1, 0, 1)
                    part *= discount
                hold_slope.append(held_slope)
            # A state exists only where x + b <= n <= last, and is reached only where x + b <= x_top + b_max plus one
            # per quarter gone (each quarter adds at most one purchase or one held quarter), one more for the x + 1
            # and b + 1 that later tables read. So a block of b from b0 on needs x only up to the smaller bound less b0.
            edges = np.linspace(0, now.b_last + 1, B_BLOCKS + 1).astype(int)
            reached = x_top + b_max + horizon - h + 1

            def best_plan(rows: tuple[int, int, int]) -> tuple[np.ndarray, np.ndarray | None]:
                """W_h on a block of b: the best of the plans J = 0..h, built up over J (and its slope, with slopes)."""
                chosen = at(held, now.first, rows=rows).copy()  # J = 0: hold throughout
                after_purchases = np.zeros_like(chosen)  # sum_{i<=J} d^i f_i W_{h-i}(n+i, x+1, b)
                candidate = np.empty_like(chosen)
                tail = np.empty_like(chosen)
                if slopes:
                    chosen_slope = at(held_slope, now.first, rows=rows).copy()
                    slope_after_purchases = np.zeros_like(chosen)
                    candidate_slope = np.empty_like(chosen)
                    weighted_orders = None if uniform else np.zeros_like(chosen)  # sum_{l<=i} d^l f_l u_{e0+l}
                for i in range(1, h + 1):
                    np.multiply(at(purchase_after[i], n_min, rows=rows), solved(after_purchase, i, 1, rows=rows), out=candidate)
                    after_purchases += candidate
                    np.add(after_purchases, at(known_part[i], n_min, rows=rows), out=candidate)
                    if rho > 0 and i < h:
                        np.multiply(at(silent_after[i], n_min, rows=rows), solved(hold_throughout, i, rows=rows), out=tail)
                        candidate += tail
                    if slopes:
                        # The same plan's slope: orders_ahead for K_i, the slopes of the tables it reads.
                        np.multiply(at(purchase_after[i], n_min, rows=rows), solved(after_slope, i, 1, rows=rows), out=candidate_slope)
                        slope_after_purchases += candidate_slope
                        if uniform:
                            np.add(slope_after_purchases, at(prepared.orders_ahead[i], n_min, rows=rows), out=candidate_slope)
                        else:
                            weighted_orders += at(purchase_after[i], n_min, rows=rows) * order_weights[elapsed + i]
                            np.add(slope_after_purchases, weighted_orders, out=candidate_slope)
                        if rho > 0 and i < h:
                            np.multiply(at(silent_after[i], n_min, rows=rows), solved(hold_slope, i, rows=rows), out=tail)
                            candidate_slope += tail
                        np.copyto(chosen_slope, candidate_slope, where=candidate > chosen)
                    np.maximum(chosen, candidate, out=chosen)
                exists = np.isfinite(at(log_moment, 0, rows=rows))
                return np.where(exists, chosen, 0.0), (np.where(exists, chosen_slope, 0.0) if slopes else None)

            blocks = [(b0, b1, min(now.x_last, now.last - b0, reached - b0) + 1) for b0, b1 in zip(edges[:-1], edges[1:])]
            blocks = [rows for rows in blocks if rows[1] > rows[0] and rows[2] > 0]
            values = np.zeros((shape[0], shape[1], band))
            value_slopes = np.zeros((shape[0], shape[1], band)) if slopes else None
            for rows, (block, block_slope) in zip(blocks, pool.map(best_plan, blocks)):  # two blocks at a time
                at(values, now.first, rows=rows)[...] = block
                if slopes:
                    at(value_slopes, now.first, rows=rows)[...] = block_slope
            after_purchase.append(values)
            if slopes:
                after_slope.append(value_slopes)
    return Program(
        process, margin, prepared.piece_cost, discount, horizon, log_moment, prepared.log_alive, after_purchase, hold_throughout, tuple(first_n),
        after_slope, hold_slope, order_weights,
    )

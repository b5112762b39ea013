"""The calendar program: the stop-rule program when quarters differ (seasons, seasonal costs) and the piece has versions.

The single-piece program (:mod:`lapsewise.decide.program`) takes every quarter
alike and plans a silent stretch as "mail J quarters, then hold". Here each
quarter of the (fiscal) year has its own purchase multiplier ``s_q`` (the
model's seasons), its own margin per order and its own piece costs, and every
quarter the firm chooses one of the policy's versions (piece cost ``c_v``,
response ``r_v``: an alive customer buys with chance ``r_v s_q p``) or holds
(chance ``rho s_q p``, no cost). Any sequence of choices over a silent stretch is
allowed, so "hold now, mail before the peak" and "full piece, then postcard,
then nothing" are both plans the program can find.

The belief, and why lines in P(alive)
-------------------------------------
A silent customer is alive with chance ``pi`` and, if alive, has a belief about
p. The value of a silent stretch's plan is ``pi G - (1 - pi) C`` (``C`` the
pieces a dead customer still receives), so the best plan depends on ``pi`` and
the program must carry it. Per unit alive, the value is the best of lines
``G - r C`` in ``r = 1/pi - 1``. The program keeps, at each state, the line of
the best plan it finds at each point ``r_k = e^(u_k) - 1`` of a grid in
``u = -log pi`` (:data:`GRID`): the point-based value iteration of Pineau,
Gordon & Thrun (2003) with P(alive) as the one continuous coordinate. A kept
line is the value of a plan the program found, so a value is what some plan
delivers (up to the mixes below), never an optimistic blend of plans; where the
best plan at a point off the grid is not among those kept, the value is a little
low (the tests measure how much). A silent quarter takes ``1/pi`` to
``(1/pi - B) / A`` (``B`` the alive customer's chance of buying, ``A`` of staying
alive and silent); there the next quarter's kept lines are compared (those
kept at points k .. k + READ - 1 for grid point k; all of them for a customer's
own pi).

The belief about p, exactly
---------------------------
An alive customer buys with chance ``c p`` (``c = r_v s_q`` under a version,
``rho s_q`` when held). Silence multiplies the belief by ``1 - c p``, and with
``k = rho s_min`` (holding in the slowest season, the smallest c)::

    1 - c p = lam (1 - p) + (1 - lam)(1 - k p),   lam = (c - k) / (1 - k) in [0, 1]

so the belief after any silent quarter is exactly a mix of two states of the
grid ``p^x (1-p)^a (1-k p)^b``: a mailed-like one (a + 1) and a held-like one
(b + 1). A customer's whole history is such a mix over b (:meth:`Belief.from_history`).
A purchase multiplies by ``c p``, and the constant c drops out. The program
values a mix as one plan on it (the lines kept at the same grid point in each
part, weighted). Without seasons ``k = rho`` and the full piece's silence is
exactly the mailed state, as in the single-piece program.

The recursion
-------------
With ``h`` quarters left (the quarter decided is of quarter-of-year ``q``), at
state ``(n, x, b)`` and grid point ``r``::

    line_v(r) = d [ B_v (m_q + U_{h-1}(n+1, x+1, b, r=0)) - c_{v,q} (1 + r)
                    + A_v (G' - r' C') ],   r' = (r + 1 - A_v - B_v) / A_v

with ``B_v = S(n,1) c E[p]``, ``A_v = S(n,1) - B_v``, ``G' - r' C'`` the best next
line at r' on the mix ``lam`` (n+1, x, b) + ``(1 - lam)`` (n+1, x, b+1) (weighted by
their chances of silence), and the kept line the best ``line_v`` at r. Holding is
the choice with ``r_v = rho`` and no cost. ``U_h(n, x, b, 0)`` is the value right
after a purchase. With one version of response 1 and no seasons the tests find
the same values as the single-piece program where its plans are optimal (and
the brute force confirms its plans, with seasons and versions, on short
horizons); :mod:`lapsewise.decide.reference` holds the slow twin and the brute force.

References
----------
Bitran, G. R., & Mondschein, S. V. (1996). Mailing Decisions in the Catalog Sales
Industry. Management Science, 42(9), 1364-1381.

Simester, D. I., Sun, P., & Tsitsiklis, J. N. (2006). Dynamic Catalog Mailing
Policies. Management Science, 52(5), 683-696.

Pineau, J., Gordon, G., & Thrun, S. (2003). Point-based value iteration: an
anytime algorithm for POMDPs. Proceedings of IJCAI 2003, 1025-1032.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np

from lapsewise.decide.program import B_BLOCKS, check_program_memory, workers
from lapsewise.model.moments import log_alive_ahead, log_moment_grid
from lapsewise.model.process import Process

N_BLOCKS = 3
"""Blocks of n in a layer: with the blocks of b they skip most of the corner where x + b > n."""

GRID = (0.0, 0.125, 0.25, 0.375, 0.5, 0.7, 0.9, 1.2, 1.6, 2.2, 3.0, 4.2, 5.5)
"""The points of the grid in u = -log P(alive): P(alive) from 1 down to about 0.004, closest where customers just
bought. Chosen by measurement against the single-piece program at 40 quarters (tests/test_calendar.py): a
finer or wider grid was not more accurate there, and each point costs time."""
FAR = 1e12
"""Where a silent quarter leaves no one alive (1/P(alive) infinite), r is taken as this: every line with pieces is then far below holding."""
READ = 3
"""A point's read takes the best of the lines kept at the grid points from its own up to READ - 1 further on."""


@dataclass(frozen=True)
class Choice:
    """One of the quarter's choices: a version of the piece, or holding (response rho, no cost).

    ``piece_cost`` has one entry per quarter of the (fiscal) year.
    """

    name: str
    response: float
    piece_cost: tuple[float, float, float, float]


@dataclass(frozen=True)
class Calendar:
    """What differs by quarter of the year: the purchase multipliers (largest 1), the margin per order, the choices."""

    seasons: tuple[float, float, float, float]
    margins: tuple[float, float, float, float]
    versions: tuple[Choice, ...]

    def choices(self, rho: float) -> tuple[Choice, ...]:
        """Holding first, then the versions."""
        return (Choice("hold", rho, (0.0, 0.0, 0.0, 0.0)),) + self.versions

    @property
    def seasonal(self) -> bool:
        """True when the quarters of the year differ (in sales, margin or a piece's cost)."""
        costs = [v.piece_cost for v in self.versions]
        return len(set(self.seasons)) > 1 or len(set(self.margins)) > 1 or any(len(set(c)) > 1 for c in costs)


def needs_calendar(process: Process, economics, versions) -> bool:
    """Whether the calendar program is needed: seasons in the model, quarters that differ in the policy, or a
    choice of pieces (several versions, or one that sells less than the full piece). Otherwise the single-piece
    program (:mod:`lapsewise.decide.program`) gives the same answer, exactly and faster."""
    return (
        process.seasonal or economics.seasonal or len(versions) > 1
        or any(v.response != 1.0 or any(c is not None for c in v.quarter_piece_costs) for v in versions)
    )


def calendar_for(process: Process, economics, versions, order_value: float) -> Calendar:
    """The calendar of a policy (its economics and versions) for customers of one order value.

    A quarter's margin is ``gross_margin * order_value - order_cost`` with that quarter's overrides (its own
    ``order_value`` replacing the customers' when it sets one); each version's piece cost is its own in that quarter.
    """
    margins = []
    for quarter in range(4):
        economics_then = economics.in_quarter(quarter)
        value = economics_then.order_value if "order_value" in dict(economics.quarters[quarter]) else order_value
        margins.append(economics_then.margin(value))
    choices = tuple(Choice(v.name, v.response, tuple(v.piece_cost_in(q) for q in range(4))) for v in versions)
    return Calendar(tuple(float(s) for s in process.multipliers), tuple(margins), choices)


def learning_process(process: Process) -> Process:
    """The process the program plans against: the model's, rho a number, its seasons in the calendar instead."""
    return Process(process.alpha, process.beta, process.gamma, process.delta, float(process.rho or 0.0))


def held_basis(process: Process, calendar: Calendar) -> float:
    """``rho s_min``: the smallest chance multiplier of any quarter's choice (holding in the slowest season)."""
    return float(process.rho or 0.0) * float(min(calendar.seasons))


@dataclass(frozen=True)
class CalendarProgram:
    """The solved tables for the layers asked to be kept, on the grid ``[b, x, n, k]``.

    Layer h decides a quarter of quarter-of-year ``(end - h) % 4``. ``tables[h]`` is a
    pair ``(G, C)``: at each state, the line ``G_k - r C_k`` of the best plan found at the
    grid's point ``r_k = e^(u_k) - 1``, per unit alive (:data:`GRID`), discounted to the
    start of the quarter decided.
    """

    process: Process
    calendar: Calendar
    discount: float
    layers: int
    end: int
    log_moment: np.ndarray
    log_alive: np.ndarray
    tables: dict
    grid: tuple = GRID
    b_max: int | None = None
    """The largest b solved for at the decision layers (a belief spread further is folded back onto it)."""

    @property
    def choices(self) -> tuple[Choice, ...]:
        return self.calendar.choices(float(self.process.rho))

    def quarter(self, h: int) -> int:
        """The quarter of the year decided with h quarters left."""
        return (self.end - h) % 4

    def b_reach(self, h: int) -> int | None:
        """The largest b solved for with h quarters left."""
        return None if self.b_max is None else self.b_max + self.layers - max(h, 1)

    def layer_for(self, quarter_of_year, horizon: int) -> np.ndarray:
        """The layer, from ``horizon`` to ``horizon + 3``, that decides a quarter of this quarter of the year
        (``horizon`` itself when every quarter is alike)."""
        if not self.calendar.seasonal:
            return np.full(np.shape(quarter_of_year), horizon)
        return horizon + (self.end - horizon - np.asarray(quarter_of_year)) % 4

    def after_purchase_at(self, h: int, b, x, n) -> np.ndarray:
        """``U_h(n, x, b, 0)``: the value right after a purchase, per unit alive (alive for sure)."""
        return self.tables[h][0][b, x, n, 0]

    def season(self, h: int) -> float:
        """The purchase multiplier of the quarter decided with h left."""
        return float(self.calendar.seasons[self.quarter(h)])

    def chances_at(self, b, x, n):
        """At states (b, x, n): ``S(n, 1)``, ``E[p]``, ``E[1 - p]`` and whether the state exists (x + b <= n)."""
        lm = self.log_moment
        here = lm[b, x, n]
        exists = np.isfinite(here)
        with np.errstate(invalid="ignore"):
            mean_p = np.where(exists, np.exp(lm[b, x + 1, n + 1] - here), 0.0)
            mailed_silent = np.where(exists, np.exp(lm[b, x, n + 1] - here), 0.0)
        return np.exp(self.log_alive[n, 1]), mean_p, mailed_silent, exists

    def choice_lines(self, h: int, b, x, n, r) -> tuple[np.ndarray, np.ndarray]:
        """Per state (arrays of one shape S) and its point r (shape S), the line ``G - r C`` of each choice now
        followed by the best lines kept for the next quarter: G and C of shape S + (choices,), per unit alive."""
        b, x, n = (np.asarray(v, dtype=np.int64) for v in (b, x, n))
        previous = self.tables.get(h - 1)
        if previous is None and h > 1:
            raise ValueError(f"the layer with {h - 1} quarters left was not kept")
        q = self.quarter(h)
        survive, mean_p, mailed_silent, exists = self.chances_at(b, x, n)
        after = previous[0][b, x + 1, n + 1, 0] if previous is not None else 0.0
        k_table = len(self.grid)
        nexts = {
            "mailed": (lambda t: t[b, x, n + 1, :k_table]),
            "held": (lambda t: t[b + 1, x, n + 1, :k_table]),
        }
        points = np.asarray(r, dtype=float)[..., None]
        work = Scratch.of(points.shape, float)
        g = np.empty(points.shape[:-1] + (len(self.choices),))
        c = np.empty_like(g)
        for index, choice in enumerate(self.choices):
            line_g, line_c = _line_of_choice(
                choice, q, self.season(h), self.calendar.margins[q], survive, mean_p, mailed_silent, after, points, previous, nexts,
                range(k_table), held_basis(self.process, self.calendar), work,
            )
            g[..., index], c[..., index] = line_g[..., 0], line_c[..., 0]
        return self.discount * np.where(exists[..., None], g, 0.0), self.discount * np.where(exists[..., None], c, 0.0)


def calendar_bytes(layers: int, n_max: int, b_max: int, x_max: int, kept: int, points: int = len(GRID), itemsize: int = 4) -> int:
    """The memory :func:`solve_calendar` takes, in bytes: two pairs of tables that take turns, a pair per kept
    layer, and the moment grid (each block's working arrays are small beside them)."""
    n_grid, b_grid, x_grid = n_max + layers + 1, b_max + layers + 1, x_max + layers + 1
    table = (b_grid + 2) * (x_grid + 2) * (n_grid + 2) * (points + READ - 1) * itemsize
    return 2 * table * (2 + kept) + 8 * (b_grid + 2) * (x_grid + 3) * (n_grid + 3)


def solve_calendar(
    process: Process, calendar: Calendar, discount: float, layers: int, end: int, n_max: int, b_max: int, x_max: int, n_min: int = 0,
    keep=(), grid=GRID, precision=np.float32,
) -> CalendarProgram:
    """Solve the tables for h = 1..layers on the states reachable from ``n_min <= n <= n_max, x <= x_max, b <= b_max``.

    ``end`` fixes the calendar: layer h decides quarter-of-year ``(end - h) % 4``. ``keep`` lists the layers whose
    tables are kept (the layer before each decision layer). With h quarters left the states reachable are one
    quarter on per layer gone: n from ``n_min + layers - h`` to ``n_max + layers - h``, x and b up to theirs plus
    ``layers - h``. Each layer is computed on slices of the grid (the next quarter's states are the same slices
    shifted by one along n, x or b), in blocks of b shared by two threads, skipping the corner where x + b > n.
    The tables are single precision by default (``precision``): half the memory traffic, about twice as fast, and
    within 1e-4 of double precision in the tests; :class:`lapsewise.decide.reference.PlainCalendar` computes the
    same tables state by state (and equals the double-precision solve to 1e-9).
    """
    check_program_memory(calendar_bytes(layers, n_max, b_max, x_max, len(keep), len(grid), np.dtype(precision).itemsize), layers, n_max)
    learning = learning_process(process)
    basis = held_basis(learning, calendar)
    n_grid, b_grid, x_grid = n_max + layers + 1, b_max + layers + 1, x_max + layers + 1
    log_moment = log_moment_grid(dataclasses.replace(learning, rho=basis), n_grid + 1, b_grid + 1, x_grid + 1)
    log_alive = log_alive_ahead(learning.gamma, learning.delta, log_moment.shape[2], 1)
    r = np.expm1(np.asarray(grid, dtype=float)).astype(precision)
    k_count = len(r)
    # Lines G - r C per state and grid point, with READ - 1 copies of the last point so that a read at k + offset is a
    # slice. Two pairs of tables take turns: each layer overwrites every state it reaches and reads only those the
    # layer before reached.
    shape = (b_grid + 2, x_grid + 2, n_grid + 2, k_count + READ - 1)
    spare = [(np.zeros(shape, precision), np.zeros(shape, precision)) for _ in range(2)]
    choices = calendar.choices(float(learning.rho))
    previous = None
    kept = {}
    with workers() as pool:
        for h in range(1, layers + 1):
            gone = layers - h
            sb, sx, n0, sn = b_max + gone + 1, x_max + gone + 1, n_min + gone, n_max + gone + 1
            q = (end - h) % 4
            season = float(calendar.seasons[q])
            # A kept layer gets tables of its own; the others take turns with the two spare pairs.
            table = (np.zeros(shape, precision), np.zeros(shape, precision)) if h in keep else spare[h % 2]

            def block(rows: tuple[int, int, int, int]) -> None:
                b0, b1, na, nb = rows
                x1 = min(sx, nb - b0)  # x + b <= n
                here = log_moment[b0:b1, :x1, na:nb]
                with np.errstate(invalid="ignore"):
                    mean_p = np.exp(log_moment[b0:b1, 1 : x1 + 1, na + 1 : nb + 1] - here)
                    mailed_silent = np.exp(log_moment[b0:b1, :x1, na + 1 : nb + 1] - here)
                mean_p, mailed_silent = mean_p.astype(precision), mailed_silent.astype(precision)
                np.copyto(mean_p, 0.0, where=~np.isfinite(mean_p))
                np.copyto(mailed_silent, 0.0, where=~np.isfinite(mailed_silent))
                survive = np.exp(log_alive[na:nb, 1]).astype(precision)
                after = previous[0][b0:b1, 1 : x1 + 1, na + 1 : nb + 1, 0] if previous is not None else 0.0
                nexts = {
                    "mailed": (lambda t: t[b0:b1, :x1, na + 1 : nb + 1]),
                    "held": (lambda t: t[b0 + 1 : b1 + 1, :x1, na + 1 : nb + 1]),
                }
                work = Scratch.of(mean_p.shape + (k_count,), precision)
                best_g, best_c = table[0][b0:b1, :x1, na:nb, :k_count], table[1][b0:b1, :x1, na:nb, :k_count]
                for index, choice in enumerate(choices):
                    g, c = _line_of_choice(
                        choice, q, season, calendar.margins[q], survive, mean_p, mailed_silent, after, r, previous, nexts, None, basis, work
                    )
                    np.multiply(r, c, out=work.choice_value)
                    np.subtract(g, work.choice_value, out=work.choice_value)  # the choice's value at each grid point
                    if index == 0:
                        best_g[...], best_c[...] = g, c
                        work.chosen[...] = work.choice_value
                    else:
                        np.greater(work.choice_value, work.chosen, out=work.better)
                        np.copyto(work.chosen, work.choice_value, where=work.better)
                        np.copyto(best_g, g, where=work.better)
                        np.copyto(best_c, c, where=work.better)
                best_g *= discount
                best_c *= discount
                for part in table:
                    part[b0:b1, :x1, na:nb, k_count:] = part[b0:b1, :x1, na:nb, k_count - 1 : k_count]

            b_edges = np.linspace(0, sb, min(B_BLOCKS * 2, sb) + 1).astype(int)
            n_edges = np.linspace(n0, sn, min(N_BLOCKS * 2, sn - n0) + 1).astype(int)
            blocks = [(b0, b1, na, nb) for b0, b1 in zip(b_edges[:-1], b_edges[1:]) for na, nb in zip(n_edges[:-1], n_edges[1:])]
            list(pool.map(block, [rows for rows in blocks if rows[1] > rows[0] and rows[3] > rows[2] and min(sx, rows[3] - rows[0]) > 0]))
            previous = table
            if h in keep:
                kept[h] = table
    return CalendarProgram(learning, calendar, discount, layers, end, log_moment, log_alive, kept, tuple(grid), b_max)


def _choice_chances(choice: Choice, season: float, survive, mean_p, mailed_silent, basis: float):
    """An alive customer's chance of buying (``c E[p]``, ``c = r s_q``) and of staying alive and silent under a
    choice, and the share of the silent belief in the mailed-like state, ``lam E[1 - p] / E[1 - c p]`` with
    ``lam`` of :func:`mixing`."""
    multiplier = choice.response * season
    buy = survive * np.minimum(multiplier * mean_p, 1.0)
    lam = mixing(multiplier, basis)
    if lam in (0.0, 1.0):
        share = np.full(np.shape(mean_p), lam)
    else:
        learnt = 1.0 - multiplier * mean_p
        with np.errstate(divide="ignore", invalid="ignore"):
            share = np.where(learnt > 0, lam * mailed_silent / np.where(learnt > 0, learnt, 1.0), 1.0)
    return buy, survive - buy, share, lam


def mixing(multiplier: float, basis: float) -> float:
    """``lam`` with ``1 - c p = lam (1 - p) + (1 - lam)(1 - k p)``: ``(c - k) / (1 - k)``, k the held-like basis.

    A silent quarter in which an alive customer would have bought with chance ``c p`` leaves the belief exactly
    this mix of a mailed-like state (one more factor ``1 - p``) and a held-like one (one more ``1 - k p``). Every
    choice's c lies between ``k = rho s_min`` and 1, so the mix has weights in [0, 1] (a version that sells less
    than holding would give a signed mix, still exact for anything linear in the belief). With k = 1 (rho 1 and
    no seasons) the two states are one and ``lam`` is taken as 1.
    """
    return 1.0 if basis >= 1.0 else (multiplier - basis) / (1.0 - basis)


@dataclass
class Scratch:
    """Working arrays of one block of states (shape S + (K,)), reused by every choice so that no large temporary is
    made: the solve's inner loop is memory-bound (a customer's own point is a block with K = 1)."""

    later: np.ndarray
    value: np.ndarray
    best: np.ndarray
    best_c: np.ndarray
    product: np.ndarray
    line_g: np.ndarray
    line_c: np.ndarray
    choice_value: np.ndarray
    chosen: np.ndarray
    better: np.ndarray

    @classmethod
    def of(cls, shape: tuple, dtype) -> "Scratch":
        arrays = [np.empty(shape, dtype) for _ in range(9)]
        return cls(*arrays, np.empty(shape, bool))


def _line_of_choice(
    choice: Choice, q: int, season: float, margin: float, survive, mean_p, mailed_silent, after, r, previous, nexts, columns, basis: float,
    work: Scratch,
):
    """The line (G, C) per unit alive, before discounting, of one choice at states (shape S) and points r (S + (K,)).

    The state's chances are ``survive`` (S(n, 1)), ``mean_p`` (E[p]) and ``mailed_silent`` (E[1 - p]); ``after``
    is the value right after a purchase next quarter. ``nexts[name](table)`` reads the next quarter's kept lines
    of the mailed-like or the held-like state; ``columns`` (None on the grid's own points, see
    :func:`_best_of_window`) says which of them are compared. The result is written into ``work``'s arrays, which
    the next call overwrites.
    """
    buy, stay, share, lam = _choice_chances(choice, season, survive, mean_p, mailed_silent, basis)
    piece = choice.piece_cost[q]
    base = (buy * (margin + after) - piece)[..., None]
    if previous is None:
        work.line_g[...] = base
        work.line_c[...] = piece
        return work.line_g, work.line_c
    dead = (1.0 - stay - buy)[..., None]
    with np.errstate(divide="ignore"):
        inverse = np.where(stay > 1.0 / FAR, 1.0 / np.maximum(stay, 1.0 / FAR), FAR)[..., None]
    later_r = np.add(r, dead, out=work.later)
    later_r *= inverse
    # The next states' lines, the silent belief's parts mixed (one plan valued on the mix).
    parts = [(weight, nexts[name]) for name, weight in (("mailed", share), ("held", 1.0 - share))
             if not ((name == "mailed" and lam == 0) or (name == "held" and lam == 1))]
    if len(parts) == 1:
        g_next, c_next = parts[0][1](previous[0]), parts[0][1](previous[1])
    else:
        (weight, mailed), (_, held) = parts
        weight = weight[..., None].astype(previous[0].dtype)
        g_next = mailed(previous[0]) - held(previous[0])  # held + w (mailed - held)
        g_next *= weight
        g_next += held(previous[0])
        c_next = mailed(previous[1]) - held(previous[1])
        c_next *= weight
        c_next += held(previous[1])
    g_later, c_later = _best_of_window(g_next, c_next, later_r, columns, work)
    # stay * (G' - r' C') with r' = (r + 1 - stay - buy) / stay is (stay G' - dead C') - r C'.
    np.multiply(g_later, stay[..., None], out=work.line_g)
    work.line_g += base
    np.multiply(c_later, dead, out=work.product)
    work.line_g -= work.product
    np.add(c_later, piece, out=work.line_c)
    return work.line_g, work.line_c


def _best_of_window(lines_g: np.ndarray, lines_c: np.ndarray, r: np.ndarray, columns, work: Scratch) -> tuple[np.ndarray, np.ndarray]:
    """The best, at the points r (shape S + (K,)), of the lines ``G - r C`` kept in the next states (S + (columns,)).

    A plan is valued on the silent belief's mix as one plan: the line kept at the same grid point in each part
    (so a mix is never valued by a different plan per part). On the grid's own points (``columns`` None) point k
    compares the lines kept at points k .. k + READ - 1: a silent quarter moves a point to a larger r, and a line
    best below r_k is best at r_k too. At a customer's own point (``columns`` a range) every kept line is compared.
    """
    k_count = r.shape[-1]
    windows = [slice(offset, offset + k_count) for offset in range(READ)] if columns is None else [slice(k, k + 1) for k in columns]
    for index, window in enumerate(windows):
        g, c = lines_g[..., window], lines_c[..., window]
        target = work.best if index == 0 else work.value
        np.multiply(r, c, out=target)
        np.subtract(g, target, out=target)
        if index == 0:
            work.best_c[...] = c
        else:
            np.greater(work.value, work.best, out=work.better)
            np.copyto(work.best, work.value, where=work.better)
            np.copyto(work.best_c, c, where=work.better)
    np.multiply(r, work.best_c, out=work.value)
    np.add(work.best, work.value, out=work.best)
    return work.best, work.best_c


# ---------------------------------------------------------------- the program's belief along a silent stretch


@dataclass(frozen=True)
class Belief:
    """The program's belief about silent customers, one per row: alive with chance ``alive``, and if alive in
    state (n, x, b) with b spread by ``weights`` (column j is b = j). A version's silence mixes a mailed-like and a
    held-like state, so after versions the weight spreads over several b; values and chances are its weighted sums.
    """

    n: np.ndarray
    x: np.ndarray
    weights: np.ndarray
    alive: np.ndarray

    @classmethod
    def after_purchase(cls, n, x, b, width: int) -> "Belief":
        """Customers who just bought, in states (n, x, b); ``width`` columns of b leave room for the stretch ahead."""
        n, x, b = (np.asarray(v, dtype=np.int64) for v in (n, x, b))
        weights = np.zeros((len(n), width))
        weights[np.arange(len(n)), b] = 1.0
        return cls(n, x, weights, np.ones(len(n)))

    @classmethod
    def from_history(cls, program: "CalendarProgram", n, x, multipliers, width: int, alive=None) -> "Belief":
        """Customers in quarter n with x repeat purchases whose silent quarters had the purchase multipliers
        ``multipliers`` (per row, a list: ``r s_q`` for a piece, ``rho s_q`` when held), exactly: each silent
        factor is the mix of :func:`mixing`, so their product is a mix over the number j of held-like factors,
        state (n, x, b = j) with weight ``e_j M(x, n - x - j, j)``. ``alive`` is P(alive) (1 when they just bought)."""
        n, x = np.asarray(n, dtype=np.int64), np.asarray(x, dtype=np.int64)
        basis = held_basis(program.process, program.calendar)
        weights = np.zeros((len(n), width))
        for row, factors in enumerate(multipliers):
            poly = np.array([1.0])
            for c in factors:
                lam = mixing(c, basis)
                poly = np.convolve(poly, [lam, 1.0 - lam])  # coefficient j: j held-like factors
            j = np.arange(len(poly))
            moments = np.exp(program.log_moment[j, x[row], n[row]])
            weights[row, : len(poly)] = poly * moments
        weights /= weights.sum(axis=1, keepdims=True)
        return cls(n, x, _folded(weights, program.b_reach(program.layers)), np.ones(len(n)) if alive is None else np.asarray(alive, dtype=float))

    def _spread(self):
        rows, columns = np.nonzero(self.weights != 0)
        return rows, columns, self.weights[rows, columns]


def belief_values(program: CalendarProgram, h: int, belief: Belief) -> np.ndarray:
    """Per row, the value of each choice now (columns: hold, then the versions) and the program after it, per customer."""
    rows, b, weight = belief._spread()
    with np.errstate(divide="ignore"):
        r = np.minimum(np.where(belief.alive > 0, 1.0 / belief.alive - 1.0, FAR), FAR)[rows]
    g, c = program.choice_lines(h, b, belief.x[rows], belief.n[rows], r)
    values = np.zeros((len(belief.n), g.shape[-1]))
    np.add.at(values, rows, weight[:, None] * (g - r[:, None] * c))
    return values * belief.alive[:, None]


def silent_step(program: CalendarProgram, h: int, belief: Belief, chosen: np.ndarray, bought: bool = False, next_layer: int | None = None) -> tuple[Belief, np.ndarray]:
    """The belief one quarter on, for customers who stay silent under the chosen choice (an index per row), and
    each row's chance of an order in the quarter (before the silence). With ``bought``, the belief one quarter on
    for those who order instead: alive, one purchase more, b weighted by each state's chance of the order.
    ``next_layer`` (default h - 1) is the layer that will read the belief: its b reaches ``b_max + layers - next_layer``."""
    rows, b, weight = belief._spread()
    n, x = belief.n[rows], belief.x[rows]
    survive, mean_p, mailed_silent, _ = program.chances_at(b, x, n)
    choices = program.choices
    buy, stay, share = np.zeros(len(rows)), np.zeros(len(rows)), np.zeros(len(rows))
    season, basis = program.season(h), held_basis(program.process, program.calendar)
    for index, choice in enumerate(choices):
        mine = chosen[rows] == index
        if mine.any():
            part = _choice_chances(choice, season, survive[mine], mean_p[mine], mailed_silent[mine], basis)
            buy[mine], stay[mine], share[mine] = part[0], part[1], part[2]
    count = len(belief.n)
    buy_row = np.bincount(rows, weight * buy, minlength=count)
    stay_row = np.bincount(rows, weight * stay, minlength=count)
    if bought:
        weights = np.zeros_like(belief.weights)
        np.add.at(weights, (rows, b), weight * buy)
        with np.errstate(invalid="ignore"):
            weights = np.where(buy_row[:, None] > 0, weights / buy_row[:, None], belief.weights)
        return Belief(belief.n + 1, belief.x + 1, weights, np.ones(count)), belief.alive * buy_row
    width = belief.weights.shape[1]
    if (b + 1 >= width).any() and (share < 1).any():
        raise ValueError("the belief needs more columns of b")
    weights = np.zeros_like(belief.weights)
    np.add.at(weights, (rows, b), weight * stay * share)
    np.add.at(weights, (rows, np.minimum(b + 1, width - 1)), weight * stay * (1.0 - share))
    with np.errstate(divide="ignore", invalid="ignore"):
        weights = np.where(stay_row[:, None] > 0, weights / stay_row[:, None], belief.weights)
        alive = np.where(stay_row > 0, belief.alive * stay_row / (1.0 - belief.alive * buy_row), 0.0)
    return Belief(belief.n + 1, belief.x, _folded(weights, program.b_reach(h - 1 if next_layer is None else next_layer)), alive), belief.alive * buy_row


def _folded(weights: np.ndarray, b_max: int | None) -> np.ndarray:
    """The belief's weight beyond ``b_max`` moved onto b_max, the largest b the decision layers were solved for
    (an approximation only for beliefs spread that far: the tail of a long run of slow-season silences)."""
    if b_max is None or weights.shape[1] <= b_max + 1:
        return weights
    weights = weights.copy()
    weights[:, b_max] += weights[:, b_max + 1 :].sum(axis=1)
    weights[:, b_max + 1 :] = 0.0
    return weights


@dataclass(frozen=True)
class SilentPlan:
    """What the program does, quarter after quarter, for customers who stay silent (arrays rows x steps).

    ``chosen`` is the index of the choice (0 hold, then the versions) for the step-th silent quarter,
    ``values`` the value of each choice there (rows x steps x choices, per customer), ``alive`` the program's
    P(alive) and ``p_buy`` the chance of an order with the full piece (the first version).
    """

    chosen: np.ndarray
    values: np.ndarray
    alive: np.ndarray
    p_buy: np.ndarray


def plan_along_silence(program: CalendarProgram, belief: Belief, quarter_of_year, horizon: int, steps: int) -> SilentPlan:
    """Follow the program through ``steps`` silent quarters from ``belief``, each decision looking ``horizon``
    quarters ahead (to ``horizon + 3``, so that every decision looks ahead to the same quarter of the year).

    ``quarter_of_year`` (per row) is the quarter of the year of the first quarter decided. The program must have
    been solved with ``horizon + 3`` layers and have kept layers ``horizon - 1`` to ``horizon + 2`` (when every
    quarter is alike: ``horizon`` layers, keeping ``horizon - 1``).
    """
    rows = len(belief.n)
    quarter = np.broadcast_to(np.asarray(quarter_of_year, dtype=np.int64), (rows,))
    count = len(program.choices)
    chosen = np.zeros((rows, steps), dtype=np.int64)
    values = np.zeros((rows, steps, count))
    alive = np.zeros((rows, steps))
    p_buy = np.zeros((rows, steps))
    for step in range(steps):
        layers = program.layer_for((quarter + step) % 4, horizon)
        following = belief
        for layer in np.unique(layers):
            mine = np.flatnonzero(layers == layer)
            part = Belief(belief.n[mine], belief.x[mine], belief.weights[mine], belief.alive[mine])
            values[mine, step] = belief_values(program, int(layer), part)
        chosen[:, step] = values[:, step].argmax(axis=1)
        alive[:, step] = belief.alive
        full = np.full(rows, 1 if count > 1 else 0)
        for layer in np.unique(layers):
            mine = np.flatnonzero(layers == layer)
            part = Belief(belief.n[mine], belief.x[mine], belief.weights[mine], belief.alive[mine])
            p_buy[mine, step] = silent_step(program, int(layer), part, full[mine])[1]
            moved, _ = silent_step(program, int(layer), part, chosen[mine, step], next_layer=program.layers)
            if following is belief:
                following = Belief(belief.n + 1, belief.x.copy(), belief.weights.copy(), belief.alive.copy())
            following.weights[mine], following.alive[mine] = moved.weights, moved.alive
        belief = following
    return SilentPlan(chosen, values, alive, p_buy)

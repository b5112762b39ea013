"""The stop-rule recursion evaluated state by state: a slow, plain twin of :mod:`lapsewise.decide.program`.

:func:`lapsewise.decide.program.solve` computes the tables ``W_h`` and ``H_h`` of
the recursion in its module docstring for every state of a grid at once, with
banded tables, running products and threads. :class:`PlainProgram` computes
the same quantities one state at a time, straight from the formulas, with the
p-moments taken from the likelihood's own function
(:func:`lapsewise.model.moments.log_p_moments`) rather than the program's grid.
The tests compare the two on small instances. Nothing here is used by a command.
"""

from __future__ import annotations

import functools
import math

import numpy as np

from scipy import special

from lapsewise.model.moments import log_death_after, log_p_moments, log_survival
from lapsewise.model.process import Process


class PlainProgram:
    """``W_h``, ``H_h`` and the decisions at silent states, one state at a time (memoised recursion)."""

    def __init__(self, process: Process, margin: float, piece_cost: float, discount: float):
        self.process = process
        self.rho = float(process.rho)
        self.margin = margin
        self.cost = piece_cost
        self.d = discount

    # ------------------------------------------------------------ the chances

    @functools.lru_cache(maxsize=None)
    def moment(self, x: int, a: int, b: int) -> float:
        """``M(x, a, b) = E[p^x (1-p)^a (1-rho p)^b]``."""
        p = self.process
        return float(np.exp(log_p_moments(np.array([[x, a, b]]), p.alpha, p.beta, self.rho)[0]))

    def survive(self, n: int, i: int) -> float:
        """``S(n, i)``: alive i quarters after quarter n, given alive through n."""
        p = self.process
        return math.exp(float(log_survival(p.gamma, p.delta, np.array(n + i)) - log_survival(p.gamma, p.delta, np.array(n))))

    def first_purchase(self, i: int, n: int, x: int, b: int) -> float:
        """``f_i``: silent through i - 1 mailed quarters, a purchase in the i-th."""
        a = n - x - b
        return self.survive(n, i) * self.moment(x + 1, a + i - 1, b) / self.moment(x, a, b)

    def still_silent(self, i: int, n: int, x: int, b: int) -> float:
        """``s_i``: alive and silent through i mailed quarters."""
        a = n - x - b
        return self.survive(n, i) * self.moment(x, a + i, b) / self.moment(x, a, b)

    def held_purchase(self, n: int, x: int, b: int) -> float:
        """``g``: an unprompted purchase in a held quarter."""
        a = n - x - b
        return self.rho * self.survive(n, 1) * self.moment(x + 1, a, b) / self.moment(x, a, b)

    def held_silence(self, n: int, x: int, b: int) -> float:
        """``q``: alive and silent through a held quarter."""
        a = n - x - b
        return self.survive(n, 1) * self.moment(x, a, b + 1) / self.moment(x, a, b)

    # ------------------------------------------------------------ the recursion

    def plan(self, J: int, h: int, n: int, x: int, b: int) -> float:
        """The value of "mail J quarters, then hold" right after a purchase, with h quarters left."""
        value = 0.0
        bought_before = 0.0
        for i in range(1, J + 1):
            f = self.first_purchase(i, n, x, b)
            value += self.d**i * (f * (self.margin + self.after_purchase(h - i, n + i, x + 1, b)) - self.cost * (1.0 - bought_before))
            bought_before += f
        return value + self.d**J * self.still_silent(J, n, x, b) * self.hold_throughout(h - J, n + J, x, b)

    @functools.lru_cache(maxsize=None)
    def after_purchase(self, h: int, n: int, x: int, b: int) -> float:
        """``W_h(n, x, b)``."""
        if h == 0:
            return 0.0
        return max(self.plan(J, h, n, x, b) for J in range(h + 1))

    @functools.lru_cache(maxsize=None)
    def hold_throughout(self, h: int, n: int, x: int, b: int) -> float:
        """``H_h(n, x, b)``."""
        if h == 0:
            return 0.0
        buy = self.held_purchase(n, x, b)
        value = buy * (self.margin + self.after_purchase(h - 1, n + 1, x + 1, b))
        return self.d * (value + self.held_silence(n, x, b) * self.hold_throughout(h - 1, n + 1, x, b + 1))

    # ------------------------------------------------------------ decisions at a silent state

    def _pieces(self, J: int) -> float:
        return self.cost * sum(self.d**i for i in range(1, J + 1))

    def mail_value(self, h: int, n: int, x: int, b: int, alive: float) -> float:
        """The best plan that mails now: ``max_{J>=1} alive * (plan_J + pieces_J) - pieces_J``."""
        return max(alive * (self.plan(J, h, n, x, b) + self._pieces(J)) - self._pieces(J) for J in range(1, h + 1))

    def hold_value(self, h: int, n: int, x: int, b: int, alive: float) -> float:
        """Hold now (an unprompted purchase or silence), then the best plan from ``(n + 1, x, b + 1)``."""
        buy = alive * self.held_purchase(n, x, b)
        silent = alive * self.held_silence(n, x, b)
        best_later = max(
            silent * (self.plan(J, h - 1, n + 1, x, b + 1) + self._pieces(J)) - (1.0 - buy) * self._pieces(J) for J in range(h)
        )
        return self.d * buy * (self.margin + self.after_purchase(h - 1, n + 1, x + 1, b)) + self.d * best_later

    def version_mail_value(self, h: int, n: int, x: int, b: int, alive: float, response: float, piece_cost: float) -> float:
        """Mail a version (chance ``response * p``, its own piece cost) now, then the best plan.

        Silence after the piece is the mix ``lam`` of a mailed and ``1 - lam`` of a held silent
        quarter, ``lam = (response - rho) / (1 - rho)``, and a plan's value is linear in the belief.
        """
        a = n - x - b
        lam = 1.0 if self.rho >= 1.0 else (response - self.rho) / (1.0 - self.rho)
        here = self.moment(x, a, b)
        survive = self.survive(n, 1)
        buy = alive * survive * response * self.moment(x + 1, a, b) / here
        value = self.d * (buy * (self.margin + self.after_purchase(h - 1, n + 1, x + 1, b)) - piece_cost)
        if h == 1:
            return value
        mailed = alive * survive * lam * self.moment(x, a + 1, b) / here
        held = alive * survive * (1.0 - lam) * self.moment(x, a, b + 1) / here
        best_later = max(
            mailed * (self.plan(J, h - 1, n + 1, x, b) + self._pieces(J))
            + held * (self.plan(J, h - 1, n + 1, x, b + 1) + self._pieces(J))
            - (1.0 - buy) * self._pieces(J)
            for J in range(h)
        )
        return value + self.d * best_later

    # ------------------------------------------------------------ orders under the plan

    def planned_orders(self, h: int, n: int, x: int, b: int, alive: float, weights) -> float:
        """Expected orders under the plan the program makes at a silent state, an order e quarters on counting
        ``weights[e]`` (undiscounted; e = 1..h): mail now or hold as the values say, then the plan chosen with it."""
        mail_plans = [alive * (self.plan(J, h, n, x, b) + self._pieces(J)) - self._pieces(J) for J in range(1, h + 1)]
        mail_value = max(mail_plans)
        mail_orders = alive * self._plan_orders(mail_plans.index(mail_value) + 1, h, n, x, b, weights, 0)
        buy = alive * self.held_purchase(n, x, b)
        silent = alive * self.held_silence(n, x, b)
        later = [silent * (self.plan(J, h - 1, n + 1, x, b + 1) + self._pieces(J)) - (1.0 - buy) * self._pieces(J) for J in range(h)]
        hold_value = self.d * buy * (self.margin + self.after_purchase(h - 1, n + 1, x + 1, b)) + self.d * max(later)
        hold_orders = buy * (weights[1] + self._after_orders(h - 1, n + 1, x + 1, b, weights, 1))
        hold_orders += silent * self._plan_orders(later.index(max(later)), h - 1, n + 1, x, b + 1, weights, 1)
        return mail_orders if mail_value >= hold_value else hold_orders

    def _plan_orders(self, J: int, h: int, n: int, x: int, b: int, weights, start: int) -> float:
        """Weighted orders of "mail J quarters, then hold" from a customer alive in state (n, x, b), ``start`` quarters on."""
        total = sum(self.first_purchase(i, n, x, b) * (weights[start + i] + self._after_orders(h - i, n + i, x + 1, b, weights, start + i)) for i in range(1, J + 1))
        return total + self.still_silent(J, n, x, b) * self._hold_orders(h - J, n + J, x, b, weights, start + J)

    def _after_orders(self, h: int, n: int, x: int, b: int, weights, start: int) -> float:
        """Weighted orders after a purchase, under the best plan there (the first of equal ones)."""
        if h == 0:
            return 0.0
        plans = [self.plan(J, h, n, x, b) for J in range(h + 1)]
        return self._plan_orders(plans.index(max(plans)), h, n, x, b, weights, start)

    def _hold_orders(self, h: int, n: int, x: int, b: int, weights, start: int) -> float:
        """Weighted orders while held throughout (unprompted orders, then the best plan after each)."""
        if h == 0:
            return 0.0
        bought = self.held_purchase(n, x, b) * (weights[start + 1] + self._after_orders(h - 1, n + 1, x + 1, b, weights, start + 1))
        return bought + self.held_silence(n, x, b) * self._hold_orders(h - 1, n + 1, x, b + 1, weights, start + 1)


# ---------------------------------------------------------------- the calendar program, state by state, and brute force


class PlainCalendar:
    """The calendar program's tables (:mod:`lapsewise.decide.calendar`) one state at a time, from its formulas.

    Same approximations as the fast solver (the learning in an average quarter, the grid of lines in P(alive),
    the mixed belief after a version), none of its layout: a memoised recursion over (h, n, x, b) with the
    moments from the likelihood's own function. The tests compare the two.
    """

    def __init__(self, process: Process, calendar, discount: float, end: int, grid=None):
        from lapsewise.decide import calendar as module

        self.module = module
        self.process = process
        self.calendar = calendar
        self.basis = module.held_basis(process, calendar)
        self.d = discount
        self.end = end
        self.r = np.expm1(np.asarray(module.GRID if grid is None else grid, dtype=float))
        self.rho = float(process.rho or 0.0)
        self.plain = PlainProgram(module.learning_process(process), 0.0, 0.0, discount)
        roots, weights = special.roots_jacobi(60, process.beta - 1.0, process.alpha - 1.0)
        self.nodes, self.weights = (roots + 1.0) / 2.0, weights / weights.sum()

    @functools.lru_cache(maxsize=None)
    def moment(self, x: int, a: int, b: int) -> float:
        """``E[p^x (1 - p)^a (1 - k p)^b]``, k the held-like basis, by Gauss-Jacobi quadrature (exact for these polynomials)."""
        p = self.nodes
        return float(np.sum(self.weights * p**x * (1.0 - p) ** a * (1.0 - self.basis * p) ** b))

    def _chances(self, h: int, n: int, x: int, b: int, choice):
        q = (self.end - h) % 4
        a = n - x - b
        here = self.moment(x, a, b)
        survive = self.plain.survive(n, 1)
        mean_p = self.moment(x + 1, a, b) / here
        mailed_silent = self.moment(x, a + 1, b) / here
        multiplier = choice.response * self.calendar.seasons[q]
        buy = survive * min(multiplier * mean_p, 1.0)
        lam = 1.0 if self.basis >= 1.0 else (multiplier - self.basis) / (1.0 - self.basis)
        share = lam if lam in (0.0, 1.0) else lam * mailed_silent / (1.0 - multiplier * mean_p)
        return q, buy, survive - buy, share, lam

    def line(self, h: int, n: int, x: int, b: int, choice, r: float, offsets) -> tuple[float, float]:
        """(G, C) of a choice now and the best kept lines after it, discounted, per unit alive."""
        q, buy, stay, share, lam = self._chances(h, n, x, b, choice)
        piece = choice.piece_cost[q]
        after = self.lines(h - 1, n + 1, x + 1, b)[0][0] if h > 1 else 0.0
        g, c = buy * (self.calendar.margins[q] + after) - piece, piece
        if h > 1:
            later_r = min((r + 1.0 - stay - buy) / stay, self.module.FAR) if stay > 0 else self.module.FAR
            parts = [(weight, self.lines(h - 1, n + 1, x, next_b)) for weight, next_b, skip in ((share, b, lam == 0), (1.0 - share, b + 1, lam == 1)) if not skip]
            best, best_c = None, None
            for offset in offsets:
                k = min(offset, len(self.r) - 1)
                line_g = sum(weight * lines[0][k] for weight, lines in parts)
                line_c = sum(weight * lines[1][k] for weight, lines in parts)
                value = line_g - later_r * line_c
                if best is None or value > best:
                    best, best_c = value, line_c
            g += stay * (best + later_r * best_c) - (1.0 - stay - buy) * best_c
            c += best_c
        return self.d * g, self.d * c

    @functools.lru_cache(maxsize=None)
    def lines(self, h: int, n: int, x: int, b: int) -> tuple[tuple[float, ...], tuple[float, ...]]:
        """The kept line (G_k, C_k) at every grid point k: the best choice's line there."""
        choices = self.calendar.choices(self.rho)
        kept_g, kept_c = [], []
        for k, r in enumerate(self.r):
            offsets = range(k, k + self.module.READ)
            best = None
            for choice in choices:
                g, c = self.line(h, n, x, b, choice, r, offsets)
                if best is None or g - r * c > best[0] - r * best[1]:
                    best = (g, c)
            kept_g.append(best[0])
            kept_c.append(best[1])
        return tuple(kept_g), tuple(kept_c)


def exact_calendar_values(process: Process, calendar, discount: float, history, first_quarter: int, horizon: int, decide=None, nodes: int = 24):
    """The exact value of a customer over the next ``horizon`` quarters, by brute force over every path.

    The hidden-churn model with seasons and versions, nothing approximated: p is integrated by Gauss-Jacobi
    quadrature (``scipy.special.roots_jacobi``; exact for the polynomials in p that arise, of degree at most
    the history's length plus the horizon, when ``2 nodes - 1`` covers it) and churn through the Beta
    functions of survival. ``history`` lists the quarters after the first purchase as (multiplier, bought)
    pairs, the multiplier being ``r s_q`` (or ``rho s_q`` when held); ``first_quarter`` is the quarter of the
    year (0-3) of the first purchase. Each quarter ahead every choice is tried, and after each the two outcomes
    (an order, or silence), so every sequence of choices and every response to what is seen is covered: the
    result is the best any policy can do (with ``decide`` None), or the value of the policy
    ``decide(path, alive)`` that names the choice's index from the path of (choice, bought) so far and the
    exact chance that the customer is alive (None: the best choice there).
    """
    roots, weights = special.roots_jacobi(nodes, process.beta - 1.0, process.alpha - 1.0)
    p = (roots + 1.0) / 2.0
    weights = weights / weights.sum()
    gamma, delta = process.gamma, process.delta
    rho = float(process.rho or 0.0)
    seasons = np.asarray(calendar.seasons, dtype=float)
    choices = calendar.choices(rho)
    n = len(history)
    # Alive through n: E[(1-theta)^n] prod f_t(p); the dead mass: died after the last purchase, silent since.
    alive = weights * math.exp(float(log_survival(gamma, delta, np.array(n))))
    dead = 0.0
    factors = np.ones_like(p)
    for t, (multiplier, bought) in enumerate(history, start=1):
        factors = factors * (multiplier * p if bought else 1.0 - multiplier * p)
    alive = alive * factors
    last_purchase = max([t for t, (_, bought) in enumerate(history, start=1) if bought], default=0)
    running = np.ones_like(p)
    for t, (multiplier, bought) in enumerate(history, start=1):
        if t > last_purchase:
            # Alive through t - 1, gone at the start of t: silent since t - 1.
            dead += float(np.sum(weights * running)) * math.exp(float(log_death_after(gamma, delta, np.array(t - 1))))
        running = running * (multiplier * p if bought else 1.0 - multiplier * p)
    total = float(alive.sum()) + dead
    alive, dead = alive / total, dead / total

    def value(alive_mass: np.ndarray, dead_mass: float, quarters: int, h: int, path: tuple) -> float:
        if h == 0:
            return 0.0
        q = (first_quarter + quarters + 1) % 4
        survive = math.exp(float(log_survival(gamma, delta, np.array(quarters + 1)) - log_survival(gamma, delta, np.array(quarters))))
        totals = []
        alive_now = float(alive_mass.sum()) / (float(alive_mass.sum()) + dead_mass)
        named = None if decide is None else decide(path, alive_now)
        indices = range(len(choices)) if named is None else [named]
        for index in indices:
            choice = choices[index]
            chance = choice.response * seasons[q] * p
            buy = alive_mass * survive * chance
            silent = alive_mass * survive * (1.0 - chance)
            died = float(alive_mass.sum()) * (1.0 - survive)
            bought = float(buy.sum())
            earned = -choice.piece_cost[q] * (float(alive_mass.sum()) + dead_mass) + bought * calendar.margins[q]
            if h > 1:
                if bought > 0:
                    earned += value(buy, 0.0, quarters + 1, h - 1, path + ((index, True),))
                earned += value(silent, dead_mass + died, quarters + 1, h - 1, path + ((index, False),))
            totals.append(discount * earned)
        return max(totals)

    return value(alive, dead, n, horizon, ())

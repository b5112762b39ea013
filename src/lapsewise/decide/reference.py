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

from lapsewise.model.moments import log_p_moments, log_survival
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

"""One simulator of the hidden-churn process: the demo's generator, the policy simulation and the tests all use it.

Customers are drawn with their purchase and churn probabilities (:func:`draw_traits`)
and stepped quarter by quarter (:func:`run_process`). A customer enters in quarter
``first`` with their first purchase and is *in play* in the quarters after it up
to ``last``. In each quarter in play:

1. an alive customer leaves for good with probability theta;
2. the mailing rule decides who is mailed, from what the firm has seen so far
   (and, with versions of the piece, which version: a choice index, 0 holding);
3. an alive customer buys with probability s_q p when mailed and rho s_q p when
   not, s_q the process's multiplier for the quarter of the year (1 without seasons);
   a version multiplies the mailed chance by its response.

The random numbers behind the leaving and the buying come from a
:class:`StreamedUniforms` (drawn quarter by quarter from one generator, which a
mailing rule may also draw from between the two) or a :class:`TabledUniforms`
(drawn in advance, so that several policies meet the same customers and the
same random numbers). The loop runs over quarters, never over customers.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Protocol

import numpy as np

from lapsewise.model.process import Process


@dataclass(frozen=True)
class Traits:
    """Each simulated customer's purchase probability p and churn probability theta."""

    p: np.ndarray
    theta: np.ndarray

    @property
    def customers(self) -> int:
        return len(self.p)


def draw_traits(process: Process, customers: int, rng: np.random.Generator) -> Traits:
    """p ~ Beta(alpha, beta), then theta ~ Beta(gamma, delta), one of each per customer."""
    return Traits(p=rng.beta(process.alpha, process.beta, customers), theta=rng.beta(process.gamma, process.delta, customers))


class Uniforms(Protocol):
    def leave(self, quarter: int) -> np.ndarray: ...

    def buy(self, quarter: int) -> np.ndarray: ...


@dataclass(frozen=True)
class StreamedUniforms:
    """Uniform draws taken from ``rng`` when asked, one per customer: leaving, then (after the rule) buying."""

    rng: np.random.Generator
    customers: int

    def leave(self, quarter: int) -> np.ndarray:
        return self.rng.random(self.customers)

    def buy(self, quarter: int) -> np.ndarray:
        return self.rng.random(self.customers)


@dataclass(frozen=True)
class TabledUniforms:
    """Uniform draws made in advance, ``(customers, quarters)``: column ``q - 1`` is quarter q's (common random numbers)."""

    leave_draw: np.ndarray
    buy_draw: np.ndarray

    @classmethod
    def draw(cls, rng: np.random.Generator, customers: int, quarters: int) -> "TabledUniforms":
        return cls(rng.random((customers, quarters)), rng.random((customers, quarters)))

    def leave(self, quarter: int) -> np.ndarray:
        return self.leave_draw[:, quarter - 1]

    def buy(self, quarter: int) -> np.ndarray:
        return self.buy_draw[:, quarter - 1]


@dataclass(frozen=True)
class SoFar:
    """What the firm has seen when a mailing rule decides quarter ``quarter``.

    ``purchased`` and ``mailed`` are filled up to column ``quarter - 1``;
    ``last_purchase`` is each customer's last purchase quarter; ``rng`` is the
    generator a randomised rule may draw from.
    """

    quarter: int
    in_play: np.ndarray
    last_purchase: np.ndarray
    purchased: np.ndarray
    mailed: np.ndarray
    rng: np.random.Generator | None


MailingRule = Callable[[SoFar], np.ndarray]


def every_quarter(seen: SoFar) -> np.ndarray:
    """Mail everyone in play."""
    return seen.in_play.copy()


def lapse_rule(lapse_after: int, winback_share: float) -> MailingRule:
    """Mail while fewer than ``lapse_after`` quarters have passed since the last purchase; after that a random
    ``winback_share`` of the lapsed each quarter (a win-back sample drawn from the simulation's generator)."""

    def rule(seen: SoFar) -> np.ndarray:
        recent = seen.quarter - 1 - seen.last_purchase < lapse_after
        return seen.in_play & (recent | (seen.rng.random(len(recent)) < winback_share))

    return rule


@dataclass(frozen=True)
class Simulated:
    """Purchases and mailings per customer and quarter (column q is quarter q), and who was alive at the end."""

    purchased: np.ndarray
    mailed: np.ndarray
    alive: np.ndarray
    chosen: np.ndarray | None = None
    """With versions: the choice per customer and quarter (0 held, i the i-th version)."""


def run_process(
    process: Process,
    traits: Traits,
    quarters: int,
    rule: MailingRule,
    uniforms: Uniforms,
    first: np.ndarray | None = None,
    last: np.ndarray | None = None,
    rng: np.random.Generator | None = None,
    calendar_start: int = 0,
    responses: np.ndarray | None = None,
) -> Simulated:
    """Step the customers through quarters ``1 .. quarters - 1``.

    ``first`` is each customer's entry quarter (default 0) and ``last`` the last
    quarter they are observed in (default ``quarters - 1``); ``rng`` is the
    generator a randomised mailing rule draws from; ``calendar_start`` the absolute
    quarter of column 0, whose ``% 4`` is its quarter of the year (for the seasons).
    With ``responses`` (one per version of the piece) the rule may name a choice per
    customer (0 hold, i the i-th version) instead of mail or not (mail: the first version).
    """
    customers = traits.customers
    first = np.zeros(customers, dtype=np.int64) if first is None else np.asarray(first)
    last = np.full(customers, quarters - 1) if last is None else np.asarray(last)
    rho = process.unmailed_response
    purchased = np.zeros((customers, quarters), dtype=np.uint8)
    mailed = np.zeros((customers, quarters), dtype=np.uint8)
    purchased[np.arange(customers), first] = 1
    alive = np.ones(customers, dtype=bool)
    last_purchase = first.copy()
    multiplier = np.concatenate([[rho], [1.0] if responses is None else np.asarray(responses, dtype=float)])
    chosen = np.zeros((customers, quarters), dtype=np.int8) if responses is not None else None
    for quarter in range(1, quarters):
        in_play = (first < quarter) & (quarter <= last)
        alive &= ~(in_play & (uniforms.leave(quarter) < traits.theta))
        decision = np.asarray(rule(SoFar(quarter, in_play, last_purchase, purchased, mailed, rng)))
        choice = np.where(in_play, decision.astype(np.int8), 0)
        mail = choice > 0
        chance = traits.p * (process.season(calendar_start + quarter) * multiplier[choice])
        bought = in_play & alive & (uniforms.buy(quarter) < chance)
        purchased[:, quarter] |= bought  # keeps the first purchases of customers entering this quarter
        mailed[:, quarter] = mail
        if chosen is not None:
            chosen[:, quarter] = choice
        last_purchase = np.where(bought, quarter, last_purchase)
    return Simulated(purchased, mailed, alive, chosen)

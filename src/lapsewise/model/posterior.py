"""Posterior quantities of the hidden-churn model per distinct history: P(alive), the next order, DERT, lapse curves.

References
----------
Fader, P. S., Hardie, B. G. S., & Berger, P. D. (2010). Customer-Base Analysis
with Discrete-Time Transaction Data. Marketing Science, 29(6), 1086-1108.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import special

from lapsewise.data.histories import Histories, mailed_silent_histories
from lapsewise.model.churn import Expansion, evaluate, expand, log_unmailed_factor
from lapsewise.model.moments import log_survival
from lapsewise.model.seasons import evaluate_seasonal, expand_seasonal, purchase_factor
from lapsewise.model.process import Process


@dataclass(frozen=True)
class Posterior:
    """Per-history posterior quantities at the as-of quarter n.

    ``p_alive`` is the probability of being alive in quarter n + 1 (FHB 2010's
    definition); ``p_buy`` the probability of a purchase in quarter n + 1 if
    mailed; ``log_likelihood`` the history's log-likelihood; ``log_buy_factor``
    the log of ``rho^x_u E_p[p^(x+1) (1-p)^a_n (1-rho p)^b_n] / L``, which times
    ``E[(1-theta)^(n+h)]`` (and times rho if unmailed) is the chance of a
    purchase in quarter n + h. ``alive_now`` is the chance of being alive through
    quarter n itself, the weight the stop-rule program starts from.

    With seasons, ``next_season`` is the quarter of the year (0-3) of quarter n + 1,
    and a purchase in quarter n + h (mailed) has the chance above times the
    multiplier of its quarter of the year; ``p_buy`` includes quarter n + 1's.
    ``seasons`` holds the multipliers (all 1 without seasons).
    """

    p_alive: np.ndarray
    p_buy: np.ndarray
    log_likelihood: np.ndarray
    log_buy_factor: np.ndarray
    n: np.ndarray
    alive_now: np.ndarray
    next_season: np.ndarray | None = None
    seasons: tuple[float, float, float, float] = (1.0, 1.0, 1.0, 1.0)

    def multipliers(self, quarters: int) -> np.ndarray:
        """The multiplier of quarters n + 1 .. n + quarters for each history, shape (histories, quarters)."""
        if self.next_season is None:
            return np.ones((len(self.n), quarters))
        return np.asarray(self.seasons)[(self.next_season[:, None] + np.arange(quarters)[None, :]) % 4]


def posterior(process: Process, histories: Histories, expansion: Expansion | None = None) -> Posterior:
    """P(alive), P(buy next quarter if mailed) and the log-likelihood of each distinct history.

    A seasonal process needs histories compressed with seasons (:func:`lapsewise.data.histories.compress`).
    ``expansion`` is :func:`~lapsewise.model.churn.expand` of the (plain) histories when the caller has it: it does
    not depend on the parameters, so posteriors under many draws of them share one.
    """
    if process.seasonal:
        return _seasonal_posterior(process, histories)
    expansion = expand(histories) if expansion is None else expansion
    log_l, moments = evaluate(expansion, process)
    unmailed = log_unmailed_factor(histories, process.rho)
    n = histories.n.astype(float)
    next_survival = log_survival(process.gamma, process.delta, n + 1)
    log_alive = next_survival + unmailed + moments[expansion.alive_triple] - log_l
    log_alive_now = log_survival(process.gamma, process.delta, n) + unmailed + moments[expansion.alive_triple] - log_l
    log_buy_factor = unmailed + moments[expansion.next_triple] - log_l
    return Posterior(
        p_alive=np.exp(log_alive),
        p_buy=np.exp(next_survival + log_buy_factor),
        log_likelihood=log_l,
        log_buy_factor=log_buy_factor,
        n=histories.n,
        alive_now=np.exp(log_alive_now),
    )


def _seasonal_posterior(process: Process, histories: Histories) -> Posterior:
    """The same quantities under the seasonal likelihood (:mod:`lapsewise.model.seasons`)."""
    if not histories.seasonal:
        raise ValueError("a seasonal process needs histories compressed with seasons")
    expansion = expand_seasonal(histories)
    log_l, moments = evaluate_seasonal(expansion, process)
    purchases = purchase_factor(expansion, process)
    n = histories.n.astype(float)
    next_survival = log_survival(process.gamma, process.delta, n + 1)
    alive = purchases + moments[expansion.alive_state] - log_l
    log_buy_factor = purchases + moments[expansion.next_state] - log_l
    next_season = (histories.phase + histories.n + 1) % 4
    return Posterior(
        p_alive=np.exp(next_survival + alive),
        p_buy=process.season(next_season) * np.exp(next_survival + log_buy_factor),
        log_likelihood=log_l,
        log_buy_factor=log_buy_factor,
        n=histories.n,
        alive_now=np.exp(log_survival(process.gamma, process.delta, n) + alive),
        next_season=next_season,
        seasons=tuple(process.seasons),
    )


def expected_orders(process: Process, post: Posterior, quarters: int) -> np.ndarray:
    """Expected purchase quarters in n+1 .. n+quarters if mailed every quarter (each quarter at its season's multiplier)."""
    h = np.arange(1, quarters + 1)[None, :]
    survival = np.exp(log_survival(process.gamma, process.delta, post.n[:, None] + h))
    return np.exp(post.log_buy_factor) * (survival * post.multipliers(quarters)).sum(axis=1)


def dert(process: Process, post: Posterior, discount_rate: float) -> np.ndarray:
    """Discounted expected residual transactions (FHB 2010) if mailed every quarter, per-quarter rate d.

    ``DERT = sum_{h>=1} P(purchase in n + h) / (1 + d)^h``, summed in closed form:
    ``B(gamma, delta + n + 1) / B(gamma, delta) / (1 + d) * 2F1(1, delta + n + 1; gamma + delta + n + 1; 1 / (1 + d))``
    times the buy factor. Where SciPy's hypergeometric function gives no finite value
    (very large gamma + delta), the series is summed term by term (:func:`_survival_series`).

    References
    ----------
    Fader, P. S., Hardie, B. G. S., & Berger, P. D. (2010). Customer-Base Analysis
    with Discrete-Time Transaction Data. Marketing Science, 29(6), 1086-1108.
    """
    n = post.n.astype(float)
    head = log_survival(process.gamma, process.delta, n + 1) - math.log1p(discount_rate)
    if post.next_season is not None:
        # With seasons the terms carry their quarter's multiplier: summed term by term per distinct (n, next season).
        keys, where = np.unique(np.stack([post.n, post.next_season], axis=1), axis=0, return_inverse=True)
        series = _survival_series(process, keys[:, 0].astype(float), discount_rate, np.asarray(post.seasons), keys[:, 1])
        return np.exp(post.log_buy_factor + head) * series[where.ravel()]
    series = special.hyp2f1(1.0, process.delta + n + 1, process.gamma + process.delta + n + 1, 1.0 / (1.0 + discount_rate))
    failed = ~np.isfinite(series)
    if failed.any():
        quarters, where = np.unique(n[failed], return_inverse=True)
        series[failed] = _survival_series(process, quarters, discount_rate)[where]
    return np.exp(post.log_buy_factor + head) * series


def _survival_series(
    process: Process, n: np.ndarray, discount_rate: float, seasons: np.ndarray | None = None, next_season: np.ndarray | None = None, terms: int = 100_000
) -> np.ndarray:
    """``2F1(1, delta + n + 1; gamma + delta + n + 1; z)`` with ``z = 1 / (1 + d)`` as the plain sum of its terms,
    ``sum_k E[(1-theta)^(n+1+k)] / E[(1-theta)^(n+1)] z^k``; every term is positive and they fall, so the sum
    stops when a term no longer changes it (or after ``terms`` terms). With ``seasons`` term k is also
    multiplied by the multiplier of quarter n + 1 + k, whose quarter of the year is ``next_season + k``."""
    weight = (lambda k: 1.0) if seasons is None else (lambda k: seasons[(next_season[:, None] + k) % 4])
    total = np.asarray(weight(np.zeros((1, 1), dtype=np.int64)), dtype=float).reshape(-1) * np.ones(len(n))
    log_z = -math.log1p(discount_rate)
    start = log_survival(process.gamma, process.delta, n + 1)
    for first in range(1, terms, 1_000):
        k = np.arange(first, first + 1_000)[None, :]
        block = (np.exp(log_survival(process.gamma, process.delta, n[:, None] + 1 + k) - start[:, None] + k * log_z) * weight(k)).sum(axis=1)
        total += block
        if np.all(block <= 1e-17 * total):
            break
    return total


def lapse_curve(process: Process, x: int, t_x: int, max_silent: int, end_quarter: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """P(alive) and P(buy next quarter) after k = 0..max_silent further mailed quarters without a purchase.

    With seasons the curve runs through the calendar from ``end_quarter`` (the as-of
    quarter): the last purchase, quarter t_x, is taken to be the as-of quarter, and
    after k silent quarters the next quarter is ``end_quarter + k + 1``.
    """
    k = np.arange(max_silent + 1)
    phase = (end_quarter - t_x) % 4 if process.seasonal else None
    hist = mailed_silent_histories(np.full(k.shape, x), np.full(k.shape, t_x), k, phase)
    post = posterior(process, hist)
    return post.p_alive[hist.inverse], post.p_buy[hist.inverse]

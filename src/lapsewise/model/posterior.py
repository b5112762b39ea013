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
from lapsewise.model.churn import evaluate, expand, log_unmailed_factor
from lapsewise.model.moments import log_survival
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
    """

    p_alive: np.ndarray
    p_buy: np.ndarray
    log_likelihood: np.ndarray
    log_buy_factor: np.ndarray
    n: np.ndarray
    alive_now: np.ndarray


def posterior(process: Process, histories: Histories) -> Posterior:
    """P(alive), P(buy next quarter if mailed) and the log-likelihood of each distinct history."""
    expansion = expand(histories)
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


def expected_orders(process: Process, post: Posterior, quarters: int) -> np.ndarray:
    """Expected purchase quarters in n+1 .. n+quarters if mailed every quarter."""
    h = np.arange(1, quarters + 1)[None, :]
    survival = np.exp(log_survival(process.gamma, process.delta, post.n[:, None] + h))
    return np.exp(post.log_buy_factor) * survival.sum(axis=1)


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
    series = special.hyp2f1(1.0, process.delta + n + 1, process.gamma + process.delta + n + 1, 1.0 / (1.0 + discount_rate))
    failed = ~np.isfinite(series)
    if failed.any():
        quarters, where = np.unique(n[failed], return_inverse=True)
        series[failed] = _survival_series(process, quarters, discount_rate)[where]
    return np.exp(post.log_buy_factor + head) * series


def _survival_series(process: Process, n: np.ndarray, discount_rate: float, terms: int = 100_000) -> np.ndarray:
    """``2F1(1, delta + n + 1; gamma + delta + n + 1; z)`` with ``z = 1 / (1 + d)`` as the plain sum of its terms,
    ``sum_k E[(1-theta)^(n+1+k)] / E[(1-theta)^(n+1)] z^k``; every term is positive and they fall, so the sum
    stops when a term no longer changes it (or after ``terms`` terms)."""
    total = np.ones(len(n))
    log_z = -math.log1p(discount_rate)
    start = log_survival(process.gamma, process.delta, n + 1)
    for first in range(1, terms, 1_000):
        k = np.arange(first, first + 1_000)[None, :]
        block = np.exp(log_survival(process.gamma, process.delta, n[:, None] + 1 + k) - start[:, None] + k * log_z).sum(axis=1)
        total += block
        if np.all(block <= 1e-17 * total):
            break
    return total


def lapse_curve(process: Process, x: int, t_x: int, max_silent: int) -> tuple[np.ndarray, np.ndarray]:
    """P(alive) and P(buy next quarter) after k = 0..max_silent further mailed quarters without a purchase."""
    k = np.arange(max_silent + 1)
    hist = mailed_silent_histories(np.full(k.shape, x), np.full(k.shape, t_x), k)
    post = posterior(process, hist)
    return post.p_alive[hist.inverse], post.p_buy[hist.inverse]

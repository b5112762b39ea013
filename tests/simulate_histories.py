"""A small simulator of the hidden-churn process for recovery tests (invented data, fixed seeds)."""

from __future__ import annotations

import numpy as np

from lapsewise.panel import Histories, compress_arrays, history_arrays


def simulate(
    customers: int,
    alpha: float,
    beta: float,
    gamma: float,
    delta: float,
    rho: float,
    quarters: tuple[int, int] = (6, 16),
    lapse_after: int | None = None,
    winback_share: float = 0.0,
    seed: int = 0,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Purchased and mailed arrays aligned on quarter 0, and n per customer.

    Without ``lapse_after`` every quarter is mailed. With it, a customer is mailed
    while fewer than ``lapse_after`` quarters have passed since the last purchase,
    and after that only with probability ``winback_share``.
    """
    rng = np.random.default_rng(seed)
    n = rng.integers(quarters[0], quarters[1] + 1, size=customers)
    width = int(n.max()) + 1
    p = rng.beta(alpha, beta, customers)
    theta = rng.beta(gamma, delta, customers)
    alive = np.ones(customers, dtype=bool)
    purchased = np.zeros((customers, width), dtype=np.uint8)
    mailed = np.zeros((customers, width), dtype=np.uint8)
    purchased[:, 0] = 1
    last = np.zeros(customers, dtype=np.int64)
    for quarter in range(1, width):
        observed = quarter <= n
        alive &= rng.random(customers) >= theta
        if lapse_after is None:
            mail = observed.copy()
        else:
            mail = observed & ((quarter - 1 - last < lapse_after) | (rng.random(customers) < winback_share))
        bought = observed & alive & (rng.random(customers) < p * np.where(mail, 1.0, rho))
        purchased[:, quarter] = bought
        mailed[:, quarter] = mail
        last = np.where(bought, quarter, last)
    return purchased, mailed, n


def simulate_histories(*args, **kwargs) -> Histories:
    purchased, mailed, n = simulate(*args, **kwargs)
    return compress_arrays(history_arrays(purchased, mailed, n))

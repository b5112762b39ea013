"""Simulated histories for recovery tests (invented data, fixed seeds), drawn with the project's one simulator."""

from __future__ import annotations

import numpy as np

from lapsewise.data.histories import Histories, compress_arrays, history_arrays
from lapsewise.evaluate.simulator import StreamedUniforms, draw_traits, every_quarter, lapse_rule, run_process
from lapsewise.model.process import Process


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
    """Purchased and mailed arrays aligned on quarter 0, and n per customer (drawn from ``quarters``).

    Without ``lapse_after`` every quarter is mailed. With it, a customer is mailed
    while fewer than ``lapse_after`` quarters have passed since the last purchase,
    and after that only with probability ``winback_share``.
    """
    rng = np.random.default_rng(seed)
    n = rng.integers(quarters[0], quarters[1] + 1, size=customers)
    process = Process(alpha, beta, gamma, delta, rho)
    traits = draw_traits(process, customers, rng)
    rule = every_quarter if lapse_after is None else lapse_rule(lapse_after, winback_share)
    result = run_process(process, traits, int(n.max()) + 1, rule, StreamedUniforms(rng, customers), last=n, rng=rng)
    return result.purchased, result.mailed, n


def simulate_histories(*args, **kwargs) -> Histories:
    purchased, mailed, n = simulate(*args, **kwargs)
    return compress_arrays(history_arrays(purchased, mailed, n))

"""Simulated histories for recovery tests (invented data, fixed seeds), drawn with the project's one simulator."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd

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


def dated_orders_and_mailings(
    customers: int,
    process: Process,
    quarters: int = 14,
    entry_quarters: int = 8,
    lapse_after: int = 2,
    winback_share: float = 0.3,
    follow_up_share: float = 0.3,
    start: str = "2015-01-01",
    seed: int = 0,
) -> tuple[pd.DataFrame, pd.DataFrame, dt.date]:
    """Day-dated orders and mailings files (invented ids, fixed seed) drawn with the project's one simulator.

    Customers enter with their first order in one of the first ``entry_quarters`` calendar quarters from
    ``start`` and are mailed by the lapse rule. The firm's regular piece is dated in the first 10 days of its
    quarter, and an order in a mailed quarter on or after that day (the piece prompts it); an order in an
    unmailed quarter falls on any day of it. After ``follow_up_share`` of all orders the firm sends a follow-up
    piece 3 to 10 days later (kept within the order's quarter): it comes after the order, so it did not prompt
    it, though it is dated in the order's quarter. One order per purchase quarter. Returns the orders
    (customer_id, order_date, amount), the mailings (customer_id, mail_date) and the last day of the history.
    """
    rng = np.random.default_rng(seed)
    first = rng.integers(0, entry_quarters, size=customers)
    traits = draw_traits(process, customers, rng)
    result = run_process(process, traits, quarters, lapse_rule(lapse_after, winback_share), StreamedUniforms(rng, customers), first=first, rng=rng)
    starts = np.array([np.datetime64(start, "M") + 3 * q for q in range(quarters + 1)]).astype("datetime64[D]")
    span = (starts[1:] - starts[:-1]).astype(np.int64)
    ids = np.char.add("R", np.char.zfill(np.arange(customers).astype(str), 5))
    # The regular pieces, then each purchase quarter's order: after the piece when mailed, anywhere when not.
    mail_quarter, mail_row = np.nonzero(result.mailed.T)
    piece_day = np.zeros(result.mailed.shape, dtype=np.int64)
    piece_day[mail_row, mail_quarter] = rng.integers(0, 10, len(mail_row))
    buy_quarter, buy_row = np.nonzero(result.purchased.T)
    earliest = piece_day[buy_row, buy_quarter]
    order_day = earliest + (rng.random(len(buy_row)) * (span[buy_quarter] - earliest)).astype(np.int64)
    follow = rng.random(len(buy_row)) < follow_up_share
    follow_day = np.minimum(order_day[follow] + rng.integers(3, 11, int(follow.sum())), span[buy_quarter[follow]] - 1)
    orders = pd.DataFrame(
        {
            "customer_id": ids[buy_row],
            "order_date": starts[buy_quarter] + order_day,
            "amount": np.round(rng.gamma(6.0, 7.5, len(buy_row)), 2),
        }
    )
    mailings = pd.DataFrame(
        {
            "customer_id": np.concatenate([ids[mail_row], ids[buy_row[follow]]]),
            "mail_date": np.concatenate([starts[mail_quarter] + piece_day[mail_row, mail_quarter], starts[buy_quarter[follow]] + follow_day]),
        }
    )
    return orders, mailings, pd.Timestamp(starts[quarters] - np.timedelta64(1, "D")).date()

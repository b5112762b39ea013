"""Builders of invented test data shared by several test modules: simulated panels, synthetic customer values,
small policies, typed order frames, and a runner of the installed command."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd

from lapsewise.budget.values import CustomerValues
from lapsewise.data.panel import Panel
from lapsewise.files.policy_file import Economics, Policy, Segments, Version
from lapsewise.model.churn import ChurnFit
from lapsewise.model.fitted import Model
from lapsewise.model.process import Process
from lapsewise.model.spend import SpendFit
from simulate_histories import simulate

TRUTH = {"alpha": 1.2, "beta": 2.5, "gamma": 0.7, "delta": 4.0, "rho": 0.3}


def simulated_panel(customers, seed, lapse_after=2, winback_share=0.25, quarters=(8, 14)) -> Panel:
    """A Panel built straight from simulated arrays (customers joined at different quarters)."""
    purchased, mailed, n = simulate(customers, *TRUTH.values(), quarters=quarters, lapse_after=lapse_after, winback_share=winback_share, seed=seed)
    end = 100
    rng = np.random.default_rng(seed)
    return Panel(
        customer_ids=np.array([f"S{i:06d}" for i in range(customers)]),
        first_quarter=end - n,
        end_quarter=end,
        purchased=purchased,
        spend=purchased * rng.gamma(6.0, 45.0 / 6.0, size=purchased.shape).astype(np.float32),
        mailed=mailed,
        mailing_history=True,
    )


def synthetic_values(rng, customers=300, versions=1, suppressed_share=0.0) -> CustomerValues:
    """Customer values drawn at random in nine segments named like the policy's."""
    segments = np.array([f"{f} repeat, {s} silent" for f, s in zip(rng.integers(0, 3, customers), rng.integers(0, 3, customers))], dtype=object)
    return CustomerValues(
        customer_ids=np.array([f"C{i:04d}" for i in range(customers)]),
        segment=segments,
        p_alive=rng.uniform(0, 1, customers),
        p_buy=rng.uniform(0, 0.3, customers),
        values=rng.normal(0.5, 2.0, (customers, versions)),
        suppressed=rng.random(customers) < suppressed_share,
        versions=tuple(f"v{i}" for i in range(versions)),
        responses=np.ones(versions),
    )


def one_version_policy(piece_cost=0.5, setup_cost=0.0, min_quantity=0) -> Policy:
    economics = Economics(0.45, 4.0, piece_cost, 0.10, 8, order_value=50.0)
    return Policy(economics, (Version("v0", piece_cost, 1.0, setup_cost, min_quantity),), Segments(), "test.toml")


def write_parquet(path: Path, frame: pd.DataFrame) -> Path:
    frame.to_parquet(path, index=False)
    return path


def typed_orders() -> pd.DataFrame:
    """conftest.GOOD_ORDERS as typed columns: text ids, timestamps, floats."""
    return pd.DataFrame(
        {
            "customer_id": ["A1", "B2", "A1"],
            "order_date": pd.to_datetime(["2023-01-15", "2023-02-01", "2023-05-02"]),
            "amount": [10.0, 25.5, 12.0],
        }
    )


def run(*args, cwd=None) -> subprocess.CompletedProcess:
    """Run ``python -m lapsewise ARGS`` as its own process, as a user would."""
    return subprocess.run([sys.executable, "-m", "lapsewise", *map(str, args)], capture_output=True, text=True, cwd=cwd)


# A small base for the value, pipeline and render tests: its process, spend model, a model and a two-version policy.
PROCESS = Process(alpha=1.2, beta=2.5, gamma=0.7, delta=4.0, rho=0.3)
SPEND = SpendFit(p=6.0, q=4.0, gamma=22.5)
MODEL = Model(ChurnFit(alpha=1.2, beta=2.5, gamma=0.7, delta=4.0, rho=0.3), SPEND, "2025-12-31", 100, 1, 400)
POLICY = Policy(Economics(0.45, 4.0, 0.9, 0.10, 6), (Version("full", 0.9), Version("card", 0.4, 0.6)), Segments(), "test")


def small_panel(customers=400, seed=3) -> Panel:
    """400 simulated customers observed for 4 to 9 quarters under a lapse rule, with spend."""
    purchased, mailed, n = simulate(customers, PROCESS.alpha, PROCESS.beta, PROCESS.gamma, PROCESS.delta, PROCESS.rho, quarters=(4, 9), lapse_after=2, winback_share=0.3, seed=seed)
    spend = purchased * np.random.default_rng(seed).gamma(6.0, 7.5, purchased.shape).astype(np.float32)
    return Panel(np.array([f"C{i:04d}" for i in range(customers)]), 100 - n, 100, purchased, spend, mailed, True)


SEASONAL_TRUTH = {"alpha": 0.8, "beta": 3.0, "gamma": 0.6, "delta": 4.0, "rho": 0.6, "seasons": (1.0, 0.5, 0.375, 0.625)}
"""A seasonal world: demand 1.6 / 0.8 / 0.6 / 1.0 by quarter of the year, scaled so that the largest is 1."""


def peak_targeted(seen):
    """Mail everyone in play in the peak quarter (quarter 0 of the year); in the others half of the customers who
    bought within the last 3 quarters: mailing aimed at the peak and at the recent, as catalogue firms do."""
    recent = seen.quarter - 1 - seen.last_purchase < 3
    if seen.quarter % 4 == 0:
        return seen.in_play.copy()
    return seen.in_play & recent & (seen.rng.random(len(recent)) < 0.5)


def seasonal_panel(customers: int, seed: int, truth: dict = SEASONAL_TRUTH, rule=peak_targeted, quarters: int = 24) -> Panel:
    """A Panel simulated on the calendar: customers enter in the first half of ``quarters`` quarters, column 0 is
    quarter of the year 0, and each quarter's purchase probability carries its season's multiplier."""
    from lapsewise.evaluate.simulator import StreamedUniforms, draw_traits, run_process

    rng = np.random.default_rng(seed)
    process = Process(truth["alpha"], truth["beta"], truth["gamma"], truth["delta"], truth["rho"], truth.get("seasons"))
    traits = draw_traits(process, customers, rng)
    first = rng.integers(0, quarters // 2, customers)
    start = 400  # an absolute quarter with 400 % 4 == 0: column j is quarter of the year j % 4
    simulated = run_process(process, traits, quarters, rule, StreamedUniforms(rng, customers), first=first, rng=rng, calendar_start=start)
    columns = first[:, None] + np.arange(quarters)[None, :]
    inside = columns < quarters
    aligned = lambda array: np.where(inside, np.take_along_axis(array, np.minimum(columns, quarters - 1), axis=1), 0).astype(np.uint8)  # noqa: E731
    purchased = aligned(simulated.purchased)
    return Panel(
        customer_ids=np.array([f"T{i:06d}" for i in range(customers)]),
        first_quarter=start + first,
        end_quarter=start + quarters - 1,
        purchased=purchased,
        spend=purchased * rng.gamma(6.0, 45.0 / 6.0, size=purchased.shape).astype(np.float32),
        mailed=aligned(simulated.mailed),
        mailing_history=True,
    )

"""Monte Carlo of mailing policies on new customers drawn from the fitted population.

Every policy meets the same customers and the same random numbers (common random
numbers): each customer's purchase and churn probabilities, the uniform draw that
decides whether they leave in each quarter, and the one that decides whether they
buy. Differences between policies are therefore paired, and their standard errors
small.

Each simulated customer has just made their first purchase (quarter 0). In each
of the following quarters the policy decides from what the firm can see; the
customer leaves for good with probability theta, and if still there buys with
probability p (mailed) or rho * p (held). Profit in quarter i is discounted by
``d ** i``, as in the program.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from lapsewise.churn import posterior
from lapsewise.panel import compress_arrays, history_arrays
from lapsewise.policy import Beliefs, Economics, Program, decide_at, solve

DROP_AFTER = (1, 2, 3, 4, 6, 8, 12)


@dataclass(frozen=True)
class Simulation:
    """Per-policy results: ``summary`` (one row per policy) and the program's own value of a new customer."""

    customers: int
    quarters: int
    seed: int
    order_value: float
    margin: float
    program_value: float | None
    summary: pd.DataFrame

    def to_dict(self) -> dict:
        return {
            "customers": self.customers,
            "quarters": self.quarters,
            "seed": self.seed,
            "order_value": round(self.order_value, 6),
            "margin_per_order": round(self.margin, 6),
            "program_value": None if self.program_value is None else round(self.program_value, 6),
            "policies": [
                {key: (round(float(value), 6) if isinstance(value, (float, np.floating)) else value) for key, value in row.items()}
                for row in self.summary.to_dict(orient="records")
            ],
        }


def _histories_now(purchased: np.ndarray, mailed: np.ndarray, quarter: int):
    n = np.full(purchased.shape[0], quarter)
    return compress_arrays(history_arrays(purchased[:, : quarter + 1], mailed[:, : quarter + 1], n))


@dataclass(frozen=True)
class Population:
    """Simulated new customers and their random numbers, shared by every policy."""

    p: np.ndarray
    theta: np.ndarray
    leave_draw: np.ndarray
    buy_draw: np.ndarray

    @property
    def customers(self) -> int:
        return len(self.p)

    @property
    def quarters(self) -> int:
        return self.leave_draw.shape[1]


def draw_population(beliefs: Beliefs, customers: int, quarters: int, seed: int) -> Population:
    rng = np.random.default_rng(seed)
    return Population(
        p=rng.beta(beliefs.alpha, beliefs.beta, customers),
        theta=rng.beta(beliefs.gamma, beliefs.delta, customers),
        leave_draw=rng.random((customers, quarters)),
        buy_draw=rng.random((customers, quarters)),
    )


def run_policy(name: str, beliefs: Beliefs, program: Program, economics: Economics, margin: float, population: Population) -> dict:
    """Simulate one policy over all customers; returns per-customer discounted profit, pieces and orders."""
    customers, quarters = population.customers, population.quarters
    fit = beliefs.churn_fit()
    purchased = np.zeros((customers, quarters + 1), dtype=np.uint8)
    mailed = np.zeros((customers, quarters + 1), dtype=np.uint8)
    purchased[:, 0] = 1
    alive = np.ones(customers, dtype=bool)
    last = np.zeros(customers, dtype=np.int64)
    profit = np.zeros(customers)
    d = economics.discount
    for quarter in range(1, quarters + 1):
        mail = _decisions(name, program, fit, economics, margin, purchased, mailed, last, quarter, quarters)
        alive &= population.leave_draw[:, quarter - 1] >= population.theta
        chance = population.p * np.where(mail, 1.0, beliefs.rho)
        bought = alive & (population.buy_draw[:, quarter - 1] < chance)
        purchased[:, quarter] = bought
        mailed[:, quarter] = mail
        last = np.where(bought, quarter, last)
        profit += d**quarter * (margin * bought - economics.piece_cost * mail)
    return {"profit": profit, "pieces": mailed.sum(axis=1), "orders": purchased[:, 1:].sum(axis=1)}


def _decisions(name, program, fit, economics, margin, purchased, mailed, last, quarter, quarters) -> np.ndarray:
    customers = purchased.shape[0]
    if name == "always mail":
        return np.ones(customers, dtype=bool)
    if name.startswith("drop after "):
        return (quarter - 1 - last) < int(name.split()[2])
    histories = _histories_now(purchased, mailed, quarter - 1)
    post = posterior(fit, histories)
    if name == "breakeven":
        return (post.p_buy * margin >= economics.piece_cost)[histories.inverse]
    horizon = min(program.horizon, quarters - quarter + 1)
    decisions = decide_at(program, histories.n, histories.x, histories.unmailed_quarters, post.alive_now, horizon)
    return decisions.mail[histories.inverse]


def policy_names() -> list[str]:
    return ["optimal"] + [f"drop after {k}" for k in DROP_AFTER] + ["breakeven", "always mail"]


def simulate_policies(beliefs: Beliefs, economics: Economics, order_value: float, customers: int, quarters: int, seed: int) -> Simulation:
    """Run every policy on the same simulated customers and compare them with the optimal one.

    With ``quarters`` up to the horizon, "optimal" is the program's policy for
    exactly that many quarters (the best any policy can do over the simulated
    window) and the program's own value of a new customer is reported beside the
    simulated mean. With more quarters, each decision looks ``horizon_quarters``
    ahead (the rolling policy) and there is no single program value to compare.
    """
    margin = economics.margin(order_value)
    horizon = min(quarters, economics.horizon_quarters)
    rolling = quarters > economics.horizon_quarters
    if rolling:
        program = solve(beliefs, margin, economics.piece_cost, economics.discount, horizon, n_max=quarters, b_max=quarters, x_max=quarters)
    else:
        # Quarter t decides with quarters - t + 1 left, so with h left a state has n, x and
        # (when held quarters teach something) b of at most quarters - h: the grid of a
        # single root at n = 0 with the whole window ahead covers them all. With rho = 0
        # held quarters move n but not the belief, so b must be allowed in full.
        program = solve(beliefs, margin, economics.piece_cost, economics.discount, horizon, n_max=0, b_max=quarters if beliefs.rho == 0 else 0, x_max=0)
    program_value = None
    if not rolling:
        start = decide_at(program, np.array([0]), np.array([0]), np.array([0]), np.array([1.0]), horizon)
        program_value = float(start.value[0])
    population = draw_population(beliefs, customers, quarters, seed)
    results = {name: run_policy(name, beliefs, program, economics, margin, population) for name in policy_names()}
    best = results["optimal"]["profit"]
    rows = []
    for name, result in results.items():
        profit = result["profit"]
        difference = profit - best
        rows.append(
            {
                "policy": name,
                "mean_profit": float(profit.mean()),
                "profit_p5": float(np.percentile(profit, 5)),
                "profit_p50": float(np.percentile(profit, 50)),
                "profit_p95": float(np.percentile(profit, 95)),
                "pieces": float(result["pieces"].mean()),
                "orders": float(result["orders"].mean()),
                "difference_to_optimal": float(difference.mean()),
                "difference_std_error": float(difference.std(ddof=1) / np.sqrt(len(difference))),
                "profit_std_error": float(profit.std(ddof=1) / np.sqrt(len(profit))),
            }
        )
    return Simulation(customers, quarters, seed, float(order_value), float(margin), program_value, pd.DataFrame(rows))

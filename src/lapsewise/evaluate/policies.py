"""Monte Carlo of mailing policies on new customers drawn from the fitted population.

Every policy meets the same customers and the same random numbers (common random
numbers, :class:`~lapsewise.evaluate.simulator.TabledUniforms`): each customer's
purchase and churn probabilities, the uniform draw that decides whether they
leave in each quarter, and the one that decides whether they buy. Differences
between policies are therefore paired, and their standard errors small.

Each simulated customer has just made their first purchase (quarter 0). In each
of the following quarters the policy decides from what the firm can see, and
the process runs as :mod:`lapsewise.evaluate.simulator` describes. Profit in
quarter i is discounted by ``d ** i``, as in the program.

The simulated customers may live in another world than the one the policies
plan in: with a seasonal model they follow the model's seasons on the calendar
(``world``), while the single-piece program plans every quarter as an average
one, so the comparison shows what planning without the calendar costs. When the
policy needs the calendar program (seasons the data support, quarters that
differ in the policy, versions of the piece), "optimal" is that program's policy,
choosing a version or holding each quarter, and the single-piece program runs
beside it as "single piece"; every policy then pays each quarter's own piece
costs and earns its own margin (the rules mail the first version).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from lapsewise.data.histories import compress_arrays, history_arrays
from lapsewise.decide import calendar as cal
from lapsewise.decide.decisions import decide_within
from lapsewise.decide.program import Program, program_bytes, solve
from lapsewise.evaluate.simulator import MailingRule, SoFar, TabledUniforms, Traits, draw_traits, every_quarter, run_process
from lapsewise.errors import InputError
from lapsewise.files.policy_file import Economics
from lapsewise.machine import available_memory, gigabytes
from lapsewise.model.posterior import posterior
from lapsewise.model.process import Process

STOP_AFTER = (1, 2, 3, 4, 6, 8, 12)
SINGLE_PIECE = "single piece"
"""The single-piece, season-blind program's policy, beside the calendar program's "optimal"."""


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
    seasons: tuple[float, float, float, float] | None = None

    @property
    def best_rule(self) -> pd.Series:
        """The row of the best rule of thumb (a policy other than the optimal one and the single-piece program)."""
        others = self.summary.iloc[1:]
        others = others[others["policy"] != SINGLE_PIECE]
        return others.loc[others["mean_profit"].idxmax()]

    def to_dict(self) -> dict:
        return {
            "customers": self.customers,
            "quarters": self.quarters,
            "seed": self.seed,
            "order_value": round(self.order_value, 6),
            "margin_per_order": round(self.margin, 6),
            "program_value": None if self.program_value is None else round(self.program_value, 6),
            "seasons": None if self.seasons is None else [round(float(v), 6) for v in self.seasons],
            "policies": [
                {key: (round(float(value), 6) if isinstance(value, (float, np.floating)) else value) for key, value in row.items()}
                for row in self.summary.to_dict(orient="records")
            ],
        }


def policy_names(calendar: bool = False) -> list[str]:
    return ["optimal"] + ([SINGLE_PIECE] if calendar else []) + [f"stop after {k}" for k in STOP_AFTER] + ["breakeven", "always mail"]


def calendar_rule(program: cal.CalendarProgram, quarters: int, horizon: int, calendar_start: int, rolling: bool) -> MailingRule:
    """The calendar program's policy: each quarter the best choice (0 hold, i the i-th version) at the program's
    belief about each customer, which it carries from quarter to quarter (after an order, or after silence under
    the choice it made). Over a window up to the horizon it decides with the quarters left in the window; over a
    longer one each decision looks ``horizon`` quarters ahead (to the same quarter of the year)."""
    state = {}

    def layer(quarter: int) -> int:
        if rolling:
            return int(program.layer_for((calendar_start + quarter) % 4, horizon))
        return quarters - quarter + 1

    def rule(seen: SoFar) -> np.ndarray:
        customers = seen.purchased.shape[0]
        if seen.quarter == 1:
            start = np.zeros(customers, dtype=np.int64)
            state["belief"] = cal.Belief.after_purchase(start, start, start, width=quarters + 2)
        else:
            before = seen.quarter - 1
            belief, chosen = state["belief"], state["chosen"]
            bought = seen.purchased[:, before].astype(bool)
            following = cal.Belief(belief.n + 1, belief.x.copy(), belief.weights.copy(), belief.alive.copy())
            for mask, ordered in ((bought, True), (~bought, False)):
                rows = np.flatnonzero(mask)
                if len(rows):
                    part = cal.Belief(belief.n[rows], belief.x[rows], belief.weights[rows], belief.alive[rows])
                    moved, _ = cal.silent_step(program, layer(before), part, chosen[rows], bought=ordered, next_layer=layer(seen.quarter))
                    following.x[rows], following.weights[rows], following.alive[rows] = moved.x, moved.weights, moved.alive
            state["belief"] = following
        values = cal.belief_values(program, layer(seen.quarter), state["belief"])
        state["chosen"] = values.argmax(axis=1)
        return state["chosen"]

    return rule


def policy_rule(name: str, process: Process, program: Program, economics: Economics, margin: float, quarters: int) -> MailingRule:
    """The mailing rule of a named policy: the single-piece program's, a rule of thumb, or always mail."""
    if name == "always mail":
        return every_quarter
    if name.startswith("stop after "):
        silent_limit = int(name.split()[2])
        return lambda seen: (seen.quarter - 1 - seen.last_purchase) < silent_limit

    def model_rule(seen: SoFar) -> np.ndarray:
        before = seen.quarter - 1
        n = np.full(seen.purchased.shape[0], before)
        histories = compress_arrays(history_arrays(seen.purchased[:, : before + 1], seen.mailed[:, : before + 1], n))
        post = posterior(process, histories)
        if name == "breakeven":
            return (post.p_buy * margin >= economics.piece_cost)[histories.inverse]
        horizon = min(program.horizon, quarters - seen.quarter + 1)
        decisions = decide_within(program, histories.n, histories.x, histories.unmailed_quarters, post.alive_now, horizon)
        return decisions.mail[histories.inverse]

    return model_rule


def run_policy(
    name: str, process: Process, program: Program, economics: Economics, margin: float, traits: Traits, uniforms: TabledUniforms, quarters: int,
    world: Process | None = None, calendar_start: int = 0, calendar: cal.Calendar | None = None, rule: MailingRule | None = None,
) -> dict:
    """Simulate one policy over all customers; returns per-customer discounted profit, pieces and orders.

    The policy plans with ``process``; the customers behave as ``world`` says (default the same), quarter 0 being
    the absolute quarter ``calendar_start`` (for the seasons). With ``calendar`` each quarter has its own margin and
    each version its own piece cost there (a rule that mails sends the first version); ``rule`` replaces the named one."""
    rule = rule or policy_rule(name, process, program, economics, margin, quarters)
    responses = None if calendar is None else np.array([v.response for v in calendar.versions])
    result = run_process(world or process, traits, quarters + 1, rule, uniforms, calendar_start=calendar_start, responses=responses)
    profit = np.zeros(traits.customers)
    d = economics.discount
    for quarter in range(1, quarters + 1):
        if calendar is None:
            profit += d**quarter * (margin * result.purchased[:, quarter] - economics.piece_cost * result.mailed[:, quarter])
        else:
            q = (calendar_start + quarter) % 4
            costs = np.array([0.0] + [v.piece_cost[q] for v in calendar.versions])
            profit += d**quarter * (calendar.margins[q] * result.purchased[:, quarter] - costs[result.chosen[:, quarter]])
    return {"profit": profit, "pieces": result.mailed.sum(axis=1), "orders": result.purchased[:, 1:].sum(axis=1)}


BYTES_PER_CUSTOMER_QUARTER = 40
"""The simulation's memory per customer and quarter: two tables of uniform draws (8 bytes each), the purchase and
mail flags, and what the model's policies build each quarter to read the histories (measured, rounded up)."""


def check_simulation_memory(customers: int, quarters: int, program: int = 0) -> None:
    """Refuse, before any work, a simulation (with its stop-rule program of ``program`` bytes) that would not fit in the free memory."""
    size = BYTES_PER_CUSTOMER_QUARTER * customers * (quarters + 1) + program
    free = available_memory()
    if size > free:
        raise InputError(
            f"simulating {customers:,} customers over {quarters} quarters needs about {gigabytes(size)} of memory and "
            f"{gigabytes(free)} is free; simulate fewer customers (--customers) or quarters (--quarters)"
        )


def simulate_policies(
    process: Process, economics: Economics, order_value: float, customers: int, quarters: int, seed: int, world: Process | None = None, calendar_start: int = 0,
    versions=None, planning: Process | None = None,
) -> Simulation:
    """Run every policy on the same simulated customers and compare them with the optimal one.

    The policies plan with ``process``; the customers are drawn from and behave as ``world`` (default ``process``),
    their quarter 0 being the absolute quarter ``calendar_start``. With ``versions`` (the policy's) and ``planning``
    (the process with its seasons, :func:`~lapsewise.decide.program.planning_process`), when the calendar program is
    needed it is "optimal" and the single-piece program runs beside it (see the module docstring).

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
        extent = {"n_max": quarters, "b_max": quarters, "x_max": quarters}
    else:
        # Quarter t decides with quarters - t + 1 left, so with h left a state has n, x and
        # (when held quarters teach something) b of at most quarters - h: the grid of a
        # single root at n = 0 with the whole window ahead covers them all. With rho = 0
        # held quarters move n but not the belief, so b must be allowed in full.
        extent = {"n_max": 0, "b_max": quarters if process.rho == 0 else 0, "x_max": 0}
    check_simulation_memory(customers, quarters, program_bytes(horizon, rho=float(process.rho), **extent))
    program = solve(process, margin, economics.piece_cost, economics.discount, horizon, **extent)
    program_value = None
    if not rolling:
        start = decide_within(program, np.array([0]), np.array([0]), np.array([0]), np.array([1.0]), horizon)
        program_value = float(start.value[0])
    calendar = rules = None
    if versions is not None and planning is not None and cal.needs_calendar(planning, economics, versions):
        calendar = cal.calendar_for(planning, economics, versions, order_value)
        layers = economics.horizon_quarters + 3 if rolling and calendar.seasonal else horizon
        keep = tuple(range(1, layers + 1)) if not rolling else tuple(range(economics.horizon_quarters - 1, layers))
        # Over the window every customer starts at the root (n = x = b = 0) with the window ahead, and the solve reaches
        # one quarter on per layer below it; a rolling decision needs every state up to the window's end at the top.
        reach = {"n_max": quarters, "b_max": quarters, "x_max": quarters} if rolling else {"n_max": 0, "b_max": 0, "x_max": 0}
        program_calendar = cal.solve_calendar(planning, calendar, economics.discount, layers, calendar_start + quarters + 1 if not rolling else layers, keep=keep, **reach)
        rules = {"optimal": calendar_rule(program_calendar, quarters, economics.horizon_quarters, calendar_start, rolling)}
        if not rolling:
            start = cal.Belief.after_purchase(np.array([0]), np.array([0]), np.array([0]), width=quarters + 2)
            program_value = float(cal.belief_values(program_calendar, quarters, start)[0].max())
    rng = np.random.default_rng(seed)
    traits = draw_traits(world or process, customers, rng)
    uniforms = TabledUniforms.draw(rng, customers, quarters)
    results = {}
    for name in policy_names(calendar is not None):
        named = "optimal" if name == SINGLE_PIECE else name
        rule = (rules or {}).get(name)
        results[name] = run_policy(named, process, program, economics, margin, traits, uniforms, quarters, world, calendar_start, calendar, rule)
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
    seasons = world.seasons if world is not None and world.seasonal else None
    return Simulation(customers, quarters, seed, float(order_value), float(margin), program_value, pd.DataFrame(rows), seasons)

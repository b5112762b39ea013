"""The budget integer program: how many customers of each segment to mail, with which version, within a budget.

Every customer's value of mailing this quarter comes from
:mod:`lapsewise.budget.values` (one value per version). Customers are grouped
into segments (:mod:`lapsewise.budget.segments`), and within a segment and
version they are taken in order of their value.

The integer program (PuLP with its bundled CBC) chooses, for every segment and
version, how many customers to mail::

    maximise    sum_{s,v,k} slope[s,v,k] * z[s,v,k]  -  sum_v setup[v] * use[v]
    subject to  m[s,v] = sum_k z[s,v,k],   0 <= z[s,v,k] <= size[s,k]      (customers taken best first)
                z[s,v,k] <= size[s,k] * pick[s,v]                           (one version per segment)
                sum_v pick[s,v] <= 1
                m[s,v] <= customers[s] * use[v]                             (a version is used or not)
                sum_s m[s,v] >= min_quantity[v] * use[v]                    (minimum print run)
                sum_v m[s,v] >= ceil(min_share[s] * customers[s])           (policy's minimum shares)
                sum_v m[s,v] <= floor(max_share[s] * customers[s])          (policy's maximum shares)
                sum_{s,v} piece_cost[v] * m[s,v] + sum_v setup[v] * use[v] <= budget
                m integer, pick and use binary

The value of taking ``m`` customers of a segment is the sum of the ``m`` best
values; it is concave in ``m`` and is held as the prefix sums at chunk
boundaries. Every customer is a chunk in a segment of at most ``CHUNKS``
customers; larger segments are cut into up to ``CHUNKS`` chunks of equal size
(fewer when there are many segments, so that about ``CHUNK_BUDGET`` chunks are
shared among them), plus a cut where any version's values turn from positive to
not positive. The value is exact at chunk boundaries and linear within, which
never overstates it. The plan's objective is therefore the true
optimum of this model; the mail list then takes the best ``m`` customers of
each segment and reports their own values.
"""

from __future__ import annotations

import dataclasses
import time
import warnings
from dataclasses import dataclass
from typing import Callable

import numpy as np
import pandas as pd
import pulp

from lapsewise.budget.segments import categorical, grouped, segment_codes
from lapsewise.budget.values import CustomerValues
from lapsewise.errors import PlanError
from lapsewise.files.policy_file import Policy
from lapsewise.model.uncertainty import RANGE

CHUNKS = 40
GAP_TOLERANCE = 1e-9  # CBC's relative optimality gap: the plan is the optimum of its model
CHUNK_BUDGET = 4_000  # rank chunks over all segments: many segments get fewer chunks each (at least MIN_CHUNKS)
MIN_CHUNKS = 10


# ---------------------------------------------------------------- the integer program


@dataclass(frozen=True)
class PlanProblem:
    """The integer program's data, independent of any solver.

    ``chunk_size[s][v]`` and ``chunk_value[s][v]`` list, for segment s and version v,
    the sizes of the chunks of customers (best first by that version's value) and
    their total values; each ``chunk_size[s][v]`` sums to ``customers[s]``. ``min_share``/``max_share`` are per segment (0 and 1 when not set).
    """

    segments: tuple[str, ...]
    customers: np.ndarray
    chunk_size: tuple[tuple[np.ndarray, ...], ...]
    chunk_value: tuple[tuple[np.ndarray, ...], ...]
    versions: tuple[str, ...]
    piece_cost: np.ndarray
    setup_cost: np.ndarray
    min_quantity: np.ndarray
    min_share: np.ndarray
    max_share: np.ndarray
    budget: float | None

    def with_budget(self, budget: float | None) -> "PlanProblem":
        return PlanProblem(**{**self.__dict__, "budget": budget})

    @property
    def min_count(self) -> np.ndarray:
        return np.ceil(self.min_share * self.customers - 1e-9).astype(np.int64)

    @property
    def max_count(self) -> np.ndarray:
        return np.floor(self.max_share * self.customers + 1e-9).astype(np.int64)


@dataclass(frozen=True)
class PlanSolution:
    """The solver's answer: customers mailed per segment and version, and what it is worth."""

    status: str
    objective: float
    mailed: np.ndarray  # (segments, versions) integer
    used: np.ndarray  # (versions,) bool
    spent: float
    solve_seconds: float
    gap_tolerance: float = GAP_TOLERANCE


def chunk_edges(sorted_values: np.ndarray, chunks: int | None = None) -> np.ndarray:
    """Rank boundaries of a segment's chunks, shared by all versions (columns of ``sorted_values``, each best first).

    Every customer is a chunk when there are at most ``chunks``; otherwise the ranks are
    cut into ``chunks`` equal parts, plus a cut where each version's values turn from
    positive to not positive, so that customers worth mailing and customers not worth
    it never share a chunk.
    """
    chunks = CHUNKS if chunks is None else chunks
    count = len(sorted_values)
    if count <= chunks:
        return np.arange(count + 1)
    cuts = np.linspace(0, count, chunks + 1).round().astype(np.int64)
    positive = (sorted_values > 0).sum(axis=0)
    return np.unique(np.concatenate([cuts, positive]))


def chunk_values(sorted_values: np.ndarray, edges: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Chunk sizes and total values of customers sorted best first (one version's values)."""
    if edges is None:
        edges = chunk_edges(sorted_values[:, None])
    prefix = np.concatenate([[0.0], np.cumsum(sorted_values)])
    return np.diff(edges), np.diff(prefix[edges])


def build_problem(values: CustomerValues, policy: Policy, budget: float | None) -> PlanProblem:
    """Group the customers who may be mailed into segments and chunk their values per version."""
    eligible = ~values.suppressed
    segments = categorical(values.segment[eligible])
    names = tuple(segments.categories)
    unknown = [s for s in list(policy.segments.min_share) + list(policy.segments.max_share) if s not in names]
    if unknown:
        raise PlanError(
            f"{policy.source}: [segments] names segment '{unknown[0]}', which has no customers; segments are named like '{names[0] if names else '0 repeat, 0 silent'}'"
        )
    sizes, chunk_sizes, chunk_totals = [], [], []
    per_segment = max(MIN_CHUNKS, min(CHUNKS, CHUNK_BUDGET // max(len(names), 1)))
    eligible_values = values.values[eligible]
    for s, members in enumerate(grouped(np.asarray(segments.codes), len(names))):
        rows = eligible_values[members]
        sizes.append(len(rows))
        ranked = -np.sort(-rows, axis=0)  # each version's values, best first
        edges = chunk_edges(ranked, per_segment)
        chunked = [chunk_values(ranked[:, v], edges) for v in range(len(values.versions))]
        chunk_sizes.append(tuple(size for size, _ in chunked))
        chunk_totals.append(tuple(total for _, total in chunked))
    return PlanProblem(
        segments=names,
        customers=np.array(sizes, dtype=np.int64),
        chunk_size=tuple(chunk_sizes),
        chunk_value=tuple(chunk_totals),
        versions=values.versions,
        piece_cost=np.array([v.piece_cost for v in policy.versions]),
        setup_cost=np.array([v.setup_cost for v in policy.versions]),
        min_quantity=np.array([v.min_quantity for v in policy.versions], dtype=np.int64),
        min_share=np.array([policy.segments.min_share.get(s, 0.0) for s in names]),
        max_share=np.array([policy.segments.max_share.get(s, 1.0) for s in names]),
        budget=budget,
    )


def _model(problem: PlanProblem, relax: set[str] = frozenset()) -> tuple[pulp.LpProblem, dict, dict]:
    """The PuLP model, written as the formulation in the module docstring. ``relax`` drops named rule groups."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DeprecationWarning)  # PuLP 3 announces its 4.0 API; the project pins pulp < 4
        return _formulate(problem, relax)


def _cbc() -> pulp.LpSolver:
    """CBC at the plan's gap tolerance. Its feasibility pump is off: on this model's tight relaxation diving and
    rounding find the optimum's neighbourhood at once, while the pump spent most of the solve looking for a first
    solution (the figures are in ``tests/bench/README.md``)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DeprecationWarning)
        return pulp.PULP_CBC_CMD(msg=False, gapRel=GAP_TOLERANCE, timeLimit=120, options=["feas off"])


def _formulate(problem: PlanProblem, relax: set[str]) -> tuple[pulp.LpProblem, dict, dict]:
    model = pulp.LpProblem("mail_budget", pulp.LpMaximize)
    segments, versions = range(len(problem.segments)), range(len(problem.versions))
    use = {v: pulp.LpVariable(f"use_{v}", cat="Binary") for v in versions}
    pick = {(s, v): pulp.LpVariable(f"pick_{s}_{v}", cat="Binary") for s in segments for v in versions}
    mailed = {(s, v): pulp.LpVariable(f"mailed_{s}_{v}", lowBound=0, upBound=int(problem.customers[s]), cat="Integer") for s in segments for v in versions}
    take = {
        (s, v, k): pulp.LpVariable(f"take_{s}_{v}_{k}", lowBound=0, upBound=int(size))
        for s in segments
        for v in versions
        for k, size in enumerate(problem.chunk_size[s][v])
    }
    slope = {(s, v, k): problem.chunk_value[s][v][k] / problem.chunk_size[s][v][k] for (s, v, k) in take}
    model += pulp.lpSum(slope[key] * take[key] for key in take) - pulp.lpSum(problem.setup_cost[v] * use[v] for v in versions), "expected_value"
    for s in segments:
        count = int(problem.customers[s])
        for v in versions:
            model += mailed[s, v] == pulp.lpSum(take[s, v, k] for k in range(len(problem.chunk_size[s][v]))), f"best_first_{s}_{v}"
            # Each chunk, not only the segment's total, is open only to the segment's chosen version: with
            # pick fractional the relaxation can then do no better than a mix of whole choices, which keeps
            # its bound close to the integer optimum (the total-only form left a gap of several percent).
            for k, size in enumerate(problem.chunk_size[s][v]):
                model += take[s, v, k] <= int(size) * pick[s, v], f"version_of_segment_{s}_{v}_{k}"
            model += mailed[s, v] <= count * use[v], f"version_in_use_{s}_{v}"
        model += pulp.lpSum(pick[s, v] for v in versions) <= 1, f"one_version_{s}"
        if "min_share" not in relax and problem.min_count[s] > 0:
            model += pulp.lpSum(mailed[s, v] for v in versions) >= int(problem.min_count[s]), f"min_share_{s}"
        if problem.max_count[s] < count:
            model += pulp.lpSum(mailed[s, v] for v in versions) <= int(problem.max_count[s]), f"max_share_{s}"
    for v in versions:
        if "min_quantity" not in relax and problem.min_quantity[v] > 0:
            model += pulp.lpSum(mailed[s, v] for s in segments) >= int(problem.min_quantity[v]) * use[v], f"min_quantity_{v}"
    if problem.budget is not None and "budget" not in relax:
        spend = pulp.lpSum(problem.piece_cost[v] * mailed[s, v] for s in segments for v in versions) + pulp.lpSum(
            problem.setup_cost[v] * use[v] for v in versions
        )
        model += spend <= problem.budget, "budget"
    return model, mailed, use


def solve_plan(problem: PlanProblem) -> PlanSolution:
    """Solve the integer program with CBC; an infeasible plan is a PlanError naming the rule that cannot be met."""
    model, mailed, use = _model(problem)
    started = time.perf_counter()
    model.solve(_cbc())
    seconds = time.perf_counter() - started
    status = pulp.LpStatus[model.status]
    if status == "Infeasible":
        raise PlanError(_infeasible_reason(problem))
    if status != "Optimal":
        raise PlanError(f"the solver stopped with status '{status}' after {seconds:.1f} s; try fewer segments or a simpler policy")
    counts = np.array([[round(mailed[s, v].value() or 0) for v in range(len(problem.versions))] for s in range(len(problem.segments))], dtype=np.int64)
    used = np.array([round(use[v].value() or 0) == 1 for v in range(len(problem.versions))])
    spent = float((counts * problem.piece_cost[None, :]).sum() + problem.setup_cost[used].sum())
    objective = pulp.value(model.objective)  # None when nothing can be mailed (no segment has a customer)
    return PlanSolution(status, float(objective or 0.0), counts.reshape(len(problem.segments), len(problem.versions)), used, spent, seconds)


def _infeasible_reason(problem: PlanProblem) -> str:
    """Name the rule that cannot be met: the first rule group whose removal makes the plan feasible."""
    for group, text in (
        ("min_share", "the [segments] min_share rules cannot all be met within the budget"),
        ("min_quantity", "a version's min_quantity (minimum print run) cannot be met within the budget"),
    ):
        model, _, _ = _model(problem, relax={group})
        model.solve(_cbc())
        if pulp.LpStatus[model.status] == "Optimal":
            extra = _min_share_cost(problem) if group == "min_share" and problem.budget is not None else ""
            return f"the plan is infeasible: {text}{extra}; raise --budget or relax the rule in the policy file"
    return "the plan is infeasible: the policy's rules contradict each other (minimum shares, print runs and budget); check the policy file"


def _min_share_cost(problem: PlanProblem) -> str:
    """The cheapest way to meet every minimum share with one version, print run and setup included, as the message quotes it."""
    pieces = int(problem.min_count.sum())
    runs = np.maximum(pieces, problem.min_quantity)
    costs = problem.setup_cost + problem.piece_cost * runs
    v = int(np.argmin(costs))
    setup = f" and its setup cost {problem.setup_cost[v]:,.2f}" if problem.setup_cost[v] else ""
    run = f", a print run of {runs[v]:,} (its minimum)" if runs[v] > pieces else ""
    return (
        f" (they take {pieces:,} pieces; the cheapest way, version '{problem.versions[v]}' at {problem.piece_cost[v]:,.2f} a piece{run}{setup}, "
        f"costs {costs[v]:,.2f} of a budget of {problem.budget:,.2f})"
    )


# ---------------------------------------------------------------- the plan


@dataclass(frozen=True)
class Plan:
    budget: float | None
    solution: PlanSolution
    segments: pd.DataFrame
    shadow_price: float | None
    frontier: pd.DataFrame | None
    assignment: np.ndarray  # per customer: version index, or -1
    setup_total: float
    rule: np.ndarray | None = None  # per customer: index into RULES of the rule that puts them out of value order
    drawn_profits: np.ndarray | None = None  # per draw of the parameters: the plan's value under it (None at the estimates)

    @property
    def profit_range(self) -> tuple[float, float] | None:
        """The 5th and 95th percentile of the plan's value over the draws of the parameters (None without draws)."""
        if self.drawn_profits is None:
            return None
        low, high = np.quantile(self.drawn_profits, RANGE)
        return float(low), float(high)

    @property
    def expected_profit(self) -> float:
        """Value of the mailings chosen (piece costs already netted) less the setup costs of the versions used."""
        return float(self.segments["expected_profit"].sum() - self.setup_total)

    @property
    def totals(self) -> dict[str, float]:
        """The segment table's columns summed over the segments: customers, mailed, cost, expected orders and value."""
        columns = ("customers", "mailed", "cost", "expected_orders", "expected_profit")
        return {column: self.segments[column].sum() if len(self.segments) else 0 for column in columns}

    def to_dict(self) -> dict:
        data = {
            "budget": self.budget,
            "spent": round(self.solution.spent, 2),
            "expected_profit": round(self.expected_profit, 4),
            "shadow_price": None if self.shadow_price is None else round(self.shadow_price, 6),
            "solver": {"status": self.solution.status, "gap_tolerance": self.solution.gap_tolerance},
            "draws": 0 if self.drawn_profits is None else len(self.drawn_profits),
            "expected_profit_low": None if self.profit_range is None else round(self.profit_range[0], 4),
            "expected_profit_high": None if self.profit_range is None else round(self.profit_range[1], 4),
            "segments": [
                {
                    "segment": r.segment,
                    "version": r.version,
                    "customers": int(r.customers),
                    "mailed": int(r.mailed),
                    "cost": round(float(r.cost), 2),
                    "expected_orders": round(float(r.expected_orders), 4),
                    "expected_profit": round(float(r.expected_profit), 4),
                }
                for r in self.segments.itertuples()
            ],
        }
        if self.frontier is not None:
            # A budget at which no plan meets the policy's rules has no value: null.
            data["frontier"] = [
                {"budget": round(float(r.budget), 2), "expected_profit": None if np.isnan(r.expected_profit) else round(float(r.expected_profit), 4)}
                for r in self.frontier.itertuples()
            ]
        return data


def _members(values: CustomerValues, problem: PlanProblem) -> list[np.ndarray]:
    """Row indices of the customers who may be mailed in each segment."""
    codes = np.where(values.suppressed, -1, segment_codes(values.segment, problem.segments))
    return grouped(codes, len(problem.segments))


RULES = ("", "min_share", "max_share", "one version per segment")
"""Why a customer is out of value order within their version: nothing, forced in by a minimum share, kept out by a
maximum share, or kept out because their segment is mailed another version."""


@dataclass(frozen=True)
class Assignment:
    """Which version each customer gets (``version``, -1: not mailed) and the rule, if any, that puts them out of value
    order within their version (``rule``, an index into :data:`RULES`)."""

    version: np.ndarray
    rule: np.ndarray


def assign(values: CustomerValues, problem: PlanProblem, solution: PlanSolution) -> Assignment:
    """The customers the plan mails: for each version, exactly the best by value among those the rules allow.

    The integer program fixes how many pieces of each version are sent and which segment takes which version;
    its values are linear within chunks of customers, so which customers fill those counts is settled here,
    exactly. For each version v, in each segment that takes v the ``min_share`` best are mailed first; then the
    best customers of all the segments that take v, or take no version yet, fill v's count, a segment stopping at
    its ``max_share``. The budget, the print runs and the setup costs are those of the program's solution. With one
    version and no shares the mailed customers are exactly the top of the ranking by value (per unit of piece cost).
    """
    customers = len(values.customer_ids)
    version = np.full(customers, -1, dtype=np.int64)
    forced = np.zeros(customers, dtype=bool)
    members = _members(values, problem)
    segment_of = np.full(customers, -1, dtype=np.int64)
    for s, rows in enumerate(members):
        segment_of[rows] = s
    holder = np.full(len(problem.segments), -1, dtype=np.int64)  # the version each segment takes
    for s, v in zip(*np.nonzero(solution.mailed)):
        holder[s] = v
    for v in np.argsort(-solution.mailed.sum(axis=0), kind="stable"):
        count = int(solution.mailed[:, v].sum())
        if count == 0:
            continue
        value = values.values[:, v]
        for s in np.flatnonzero(holder == v):  # minimum shares first, each segment's best
            rows = members[s]
            best = rows[np.argsort(-value[rows], kind="stable")][: int(problem.min_count[s])]
            version[best] = v
            forced[best] = True
        open_segment = (holder == v) | (holder == -1)
        pool = np.flatnonzero((segment_of >= 0) & (version < 0))
        pool = pool[open_segment[segment_of[pool]]]
        pool = pool[np.argsort(-value[pool], kind="stable")]
        room = (problem.max_count - np.bincount(segment_of[version == v], minlength=len(problem.segments)))[segment_of[pool]]
        rank = _rank_within(segment_of[pool])
        chosen = pool[rank < room][: max(count - int((version == v).sum()), 0)]
        version[chosen] = v
        holder[np.unique(segment_of[chosen])] = v
    return Assignment(version, _rules(values, problem, version, forced, segment_of, holder))


def _rank_within(groups: np.ndarray) -> np.ndarray:
    """Each position's rank among the earlier positions of the same group (0 for a group's first)."""
    order = np.argsort(groups, kind="stable")
    sorted_groups = groups[order]
    starts = np.flatnonzero(np.r_[True, sorted_groups[1:] != sorted_groups[:-1]])
    first = np.repeat(starts, np.diff(np.r_[starts, len(groups)]))
    rank = np.empty(len(groups), dtype=np.int64)
    rank[order] = np.arange(len(groups)) - first
    return rank


def _rules(values: CustomerValues, problem: PlanProblem, version: np.ndarray, forced: np.ndarray, segment_of: np.ndarray, holder: np.ndarray) -> np.ndarray:
    """Name the rule behind every customer out of value order within a version (see :func:`assign`)."""
    rule = np.zeros(len(version), dtype=np.int64)
    best = values.values.argmax(axis=1)
    waiting = (version < 0) & (segment_of >= 0) & (values.values[np.arange(len(best)), best] > 0)
    mailed_count = np.bincount(segment_of[version >= 0], minlength=len(problem.segments))
    for v in np.unique(version[version >= 0]):
        value = values.values[:, v]
        free = (version == v) & ~forced
        lowest_free = value[free].min() if free.any() else np.inf
        above = waiting & (best == v) & (value > lowest_free)
        held_by_other = above & (holder[np.maximum(segment_of, 0)] != v) & (holder[np.maximum(segment_of, 0)] >= 0)
        rule[held_by_other] = RULES.index("one version per segment")
        at_cap = above & ~held_by_other & (mailed_count[np.maximum(segment_of, 0)] >= problem.max_count[np.maximum(segment_of, 0)])
        rule[at_cap] = RULES.index("max_share")
        best_waiting = value[waiting & (best == v)].max() if (waiting & (best == v)).any() else -np.inf
        rule[forced & (version == v) & (value < best_waiting)] = RULES.index("min_share")
    return rule


SEGMENT_COLUMNS = ("segment", "version", "customers", "mailed", "cost", "expected_orders", "expected_profit")


def segment_report(values: CustomerValues, problem: PlanProblem, assignment: np.ndarray) -> pd.DataFrame:
    """Per segment: the version it is mailed, customers, mailed, cost, expected orders and value, from the assignment."""
    rows = []
    for s, candidates in enumerate(_members(values, problem)):
        members = candidates[assignment[candidates] >= 0]
        v = int(assignment[members[0]]) if len(members) else -1
        rows.append(
            {
                "segment": problem.segments[s],
                "version": problem.versions[v] if v >= 0 else "-",
                "customers": int(problem.customers[s]),
                "mailed": int(len(members)),
                "cost": float(len(members) * (problem.piece_cost[v] if v >= 0 else 0.0)),
                "expected_orders": float((values.p_buy[members] * values.responses[assignment[members]]).sum()) if len(members) else 0.0,
                "expected_profit": float(values.values[members, assignment[members]].sum()) if len(members) else 0.0,
            }
        )
    return pd.DataFrame(rows, columns=SEGMENT_COLUMNS)


def make_plan(values: CustomerValues, policy: Policy, budget: float | None, frontier_points: int = 0, each: Callable = map) -> Plan:
    """Solve the plan at the budget, its shadow price by re-solving, and optionally the budget frontier.

    The shadow price re-solves at a budget 1% higher (at least 1). ``each`` maps
    :func:`solve_plan` over the two problems in order (the pipeline passes one that
    runs them side by side); an error of the plan itself is raised first.
    """
    problem = build_problem(values, policy, budget)
    step = max(1.0, 0.01 * budget) if budget is not None else None
    problems = [problem] + ([problem.with_budget(budget + step)] if budget is not None else [])
    solutions = iter(each(solve_plan, problems))
    solution = next(solutions)
    assigned = assign(values, problem, solution)
    report = segment_report(values, problem, assigned.version)
    shadow = None if budget is None else (next(solutions).objective - solution.objective) / step
    frontier = None
    if frontier_points:
        frontier = budget_frontier(problem, frontier_points, budget)
    chosen = Plan(budget, solution, report, shadow, frontier, assigned.version, float(problem.setup_cost[solution.used].sum()), assigned.rule)
    if values.draws:  # the plan's value under each draw: its expected value plus the draw's offset on the customers mailed
        chosen = dataclasses.replace(chosen, drawn_profits=chosen.expected_profit + values.drawn_offsets(assigned.version))
    return chosen


def budget_frontier(problem: PlanProblem, points: int, budget: float | None = None) -> pd.DataFrame:
    """Expected value over a range of budgets, up to what mailing every customer worth mailing would cost
    (NaN at a budget where no plan meets the policy's rules)."""
    unlimited = solve_plan(problem.with_budget(None))
    top = max(unlimited.spent, budget or 0.0) * 1.1
    budgets = np.linspace(0.0, top, points + 1)[1:]
    rows = []
    for amount in budgets:
        try:
            rows.append({"budget": amount, "expected_profit": solve_plan(problem.with_budget(float(amount))).objective})
        except PlanError:
            rows.append({"budget": amount, "expected_profit": float("nan")})
    return pd.DataFrame(rows)

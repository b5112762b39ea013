"""Benchmark of ``lapsewise mail-list`` on the simulated base of bench_fit.py, stage by stage, against the same floor.

Run by hand (never collected by pytest, never asserts on time)::

    python tests/bench/bench_mail_list.py                                   # 1,000,000 customers, 40 quarters, ./bench-data
    python tests/bench/bench_mail_list.py --customers 20000 --dir /tmp/bench-small

What it does (the data, the floor, the Meter and the table come from bench_fit.py):

1. Draws or reuses the Parquet files exactly as bench_fit.py does. The model is
   fitted once with ``model.fit_model`` on the panel (timed as "fit (for the
   model file)") and written to ``model.json`` in the data folder, with that
   stage's figures in ``model-fit.json``; later runs reuse both unless
   ``--regenerate`` or the data changed.
2. Times, in this process, the stages of ``lapsewise mail-list MODEL ORDERS
   --mailings M --policy policies/full-catalog.toml --out LIST.csv``: read model and
   policy, read orders, read mailings, build panel, compress, posterior,
   customer values (which compresses and computes the posterior again, then solves
   the stop-rule program, with its slopes, at each margin of the grid the
   customers' own order values are read between; one ``program.solve`` at the
   customers' states is repeated on its own), plan without a budget and with a budget of 200,000,
   mail list assembly and the CSV write. Then runs ``lapsewise fit`` and
   ``lapsewise mail-list`` as subprocesses (wall time and peak RSS), the latter
   with its default 20 draws of the parameters and with ``--plug-in``.
3. The stop-rule program alone for a 40-quarter horizon: ``program.solve`` with
   rho = 0 and 0.3 at the stop table's size and at the size mail-list used, and
   ``stop_table.build_stop_table`` for the full-catalog policy with the fitted model,
   at the estimates and with 20 draws of the parameters (the command's default).
4. The plan integer program at 200 segments x 3 versions on synthetic, seeded
   customer values (built into a PlanProblem by ``integer_program.build_problem``, which
   chunks them with ``integer_program.chunk_values``): ``integer_program.solve_plan`` alone, then
   ``integer_program.make_plan`` with its shadow-price re-solves counted.
5. Prints one table of every stage (seconds, peak RSS, ratio to the floor) and
   the performance targets with the measured figure beside each.
"""

from __future__ import annotations

import argparse
import contextlib
import datetime as dt
import gc
import json
import sys
import tempfile
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))

from bench_fit import CountedCalls, Meter, Stage, add_data_options, machine_reference, measure_floor, open_data, print_table, run_cli, run_command_median  # noqa: E402

from lapsewise.app import pipeline  # noqa: E402
from lapsewise.budget import integer_program as plan_module  # noqa: E402
from lapsewise.budget import values as values_module
from lapsewise.data import histories as histories_module  # noqa: E402
from lapsewise.data import panel as panel_module
from lapsewise.decide import own_margins as own_margins_module
from lapsewise.decide import program as program_module  # noqa: E402
from lapsewise.decide import stop_table as stop_table_module
from lapsewise.files import policy_file  # noqa: E402
from lapsewise.files.inputs import load_orders_and_mailings  # noqa: E402
from lapsewise.files.writing import dumps_stable, save_csv, write_text_atomic  # noqa: E402
from lapsewise.model import fitted as model_module  # noqa: E402
from lapsewise.model import posterior as posterior_module
from lapsewise.model.process import Process  # noqa: E402

POLICY = Path(__file__).resolve().parents[2] / "policies" / "full-catalog.toml"
BUDGET = 200_000.0
DRAWS = 20  # the parameter draws of mail-list and stop-table by default (lapsewise.app.cli.DEFAULT_DRAWS)

# The stop-rule program alone: a typical fitted base and catalog economics, 40 quarters ahead.
HORIZON = 40
MARGIN = 16.0
PIECE_COST = 0.9
DISCOUNT = 1.1**-0.25
STOP_TABLE_SIZE = {"n_max": 2 * HORIZON, "b_max": 0, "n_min": 0, "x_max": HORIZON}  # what build_stop_table solves

# The synthetic plan: segments of 1,000-10,000 customers, three versions of the piece.
PLAN_SEGMENTS = 200
PLAN_SEED = 11
VERSIONS = (  # name, piece cost, response relative to the full piece, setup cost, minimum run
    ("full", 1.2, 1.0, 0.0, 0),
    ("digest", 0.8, 0.7, 300.0, 2000),
    ("postcard", 0.4, 0.45, 150.0, 1000),
)

# The targets of the performance issue.
TARGET_RATIO = 3.0
TARGET_PEAK_MB = 4096.0
TARGET_FIT_AFTER_COMPRESSION = 2.0
TARGET_STOP_RULE = 1.0
TARGET_PLAN = 5.0


# ---------------------------------------------------------------- the model file


def fitted_model(meter: Meter, panel, folder: Path, meta: dict, refit: bool) -> dict:
    """Fit and write model.json unless one fitted on these data is there; returns the fit's figures (recorded or new)."""
    model_path, record_path = folder / "model.json", folder / "model-fit.json"
    if not refit and model_path.exists() and record_path.exists():
        record = json.loads(record_path.read_text())
        if record.get("data") == meta:
            print(f"  Reusing {model_path}, fitted {record['fitted']} (pass --regenerate to fit it again).")
            meter.stages.append(Stage("fit (for the model file)", record["seconds"], record["peak_mb"], record["added_mb"], f"recorded {record['fitted']}; {record['note']}"))
            return record
    with CountedCalls(model_module, "compress") as compress:
        model = meter.run("fit (for the model file)", model_module.fit_model, panel)
    stage = meter.stages[-1]
    after = stage.seconds - compress.seconds
    stage.note = f"compress inside {compress.seconds:.2f} s, fit after compression {after:.2f} s"
    write_text_atomic(model_path, dumps_stable(model.to_dict()), force=True)
    record = {
        "data": meta,
        "fitted": dt.datetime.now().isoformat(timespec="seconds"),
        "seconds": stage.seconds,
        "peak_mb": stage.peak_mb,
        "added_mb": stage.added_mb,
        "compress_seconds": compress.seconds,
        "after_compression_seconds": after,
        "note": stage.note,
    }
    record_path.write_text(json.dumps(record, indent=2) + "\n")
    return record


# ---------------------------------------------------------------- the stages of mail-list


def run_mail_list_stages(meter: Meter, paths: dict[str, Path], meta: dict, refit: bool, out_folder: Path) -> dict:
    """Run the stages of ``mail-list`` in order, measured (fitting the model file first when needed)."""
    out: dict = {}
    orders, mailings = meter.run("read orders and mailings", load_orders_and_mailings, paths["orders"], paths["mailings"])
    meter.stages[-1].note = "side by side, as mail-list reads them"
    panel = meter.run("build panel", panel_module.build_panel, orders, mailings, dt.date.fromisoformat(meta["as_of"]), 1)
    del orders, mailings
    out["fit"] = fitted_model(meter, panel, paths["orders"].parent, meta, refit)
    out["model_path"] = paths["orders"].parent / "model.json"
    model, policy = meter.run("read model and policy", lambda: (model_module.load_model(out["model_path"]), policy_file.load_policy(POLICY)))

    histories = meter.run("compress", histories_module.compress, panel)
    process = program_module.decision_process(model.churn, policy.economics.unmailed_response)
    meter.run("posterior", posterior_module.posterior, process, histories)
    out["histories"] = histories.size
    del histories

    with contextlib.ExitStack() as stack:
        parts = {
            name: stack.enter_context(CountedCalls(module, name, keep_arguments=name in ("chances", "hold_now_value")))
            for module, name in (
                (pipeline, "compress"), (pipeline, "posterior"), (pipeline, "summarize"), (values_module, "chances"),
                (own_margins_module, "solve_with"), (values_module, "hold_now_value"), (values_module, "version_mail_value"),
            )
        }
        values = meter.run("customer values", pipeline.value_customers, model, panel, policy)
    meter.stages[-1].note = "inside (the posterior runs beside the first programs, so the seconds add up to more than they took): " + ", ".join(
        f"{name} {counter.seconds:.2f} s" + (f" ({counter.calls} calls)" if counter.calls != 1 else "") for name, counter in parts.items()
    )
    shared, per_margin = parts["chances"], parts["solve_with"]
    out["solve_calls"] = [(kwargs, seconds) for (_, kwargs), seconds in zip(shared.arguments, shared.durations)] + [("one margin", s) for s in per_margin.durations]
    out["program_states"] = sum(len(args[1]) for args, _ in parts["hold_now_value"].arguments)
    (process_used, piece, discount, horizon), kwargs = shared.arguments[0]
    meter.run("program.solve (one margin)", program_module.solve, process_used, MARGIN, piece, discount, horizon, note=f"the customers' states: {_size(kwargs)}", **kwargs)
    out["mail_list_size"] = kwargs

    plans = {}
    for label, budget in (("plan (no budget)", None), (f"plan (budget {BUDGET:,.0f})", BUDGET)):
        with CountedCalls(plan_module, "solve_plan") as solve_plan:
            plans[budget] = meter.run(label, pipeline.plan, values, policy, budget)
        meter.stages[-1].note = (
            f"{solve_plan.calls} solve_plan calls ({solve_plan.calls - 1} shadow-price re-solve), {solve_plan.seconds:.2f} s in them; "
            f"status {plans[budget].solution.status}, spent {plans[budget].solution.spent:,.0f}"
        )
    out["segments"] = len(plans[None].segments)

    rows = meter.run("mail list assembly", pipeline.mail_list_rows, values, plans[None])
    out["decisions"] = rows["decision"].value_counts().to_dict()
    csv = out_folder / "mail-list.csv"
    meter.run("write CSV", save_csv, csv, rows, True)
    meter.stages[-1].note = f"{len(rows):,} rows, {csv.stat().st_size / 2**20:.0f} MB (formula-like text neutralised, numbers checked)"
    out["model"], out["policy"], out["customers"] = model, policy, panel.customers
    return out


def _size(kwargs: dict) -> str:
    return ", ".join(f"{key}={kwargs[key]}" for key in ("n_max", "b_max", "n_min", "x_max"))


# ---------------------------------------------------------------- the stop-rule program alone


def run_stop_rule(meter: Meter, mail_list_size: dict, model, policy) -> list[Stage]:
    """program.solve at two sizes for rho = 0 and 0.3, then the stop table for the policy; returns the solve stages."""
    solves = []
    for rho in (0.0, 0.3):
        process = Process(1.1, 2.4, 0.7, 4.5, rho)
        for where, size in (("stop-table size", STOP_TABLE_SIZE), ("mail-list size", mail_list_size)):
            meter.run(f"solve rho={rho:g}, {where}", program_module.solve, process, MARGIN, PIECE_COST, DISCOUNT, HORIZON, note=_size(size), **size)
            solves.append(meter.stages[-1])
    with CountedCalls(stop_table_module, "solve_with") as inside:
        meter.run("stop table (full catalog)", pipeline.stop_table, model, policy)
    meter.stages[-1].note = f"{inside.calls} solve calls, {inside.seconds:.2f} s in them; horizon {policy.economics.horizon_quarters}, rho {model.churn.rho}"
    with CountedCalls(stop_table_module, "solve_with") as inside:
        meter.run(f"stop table, {DRAWS} draws (the command's default)", pipeline.stop_table, model, policy, DRAWS, 1)
    meter.stages[-1].note = f"{inside.calls} solve calls, {inside.seconds:.2f} s in them"
    return solves


# ---------------------------------------------------------------- the plan integer program at 200 x 3


def synthetic_values(seed: int) -> tuple[values_module.CustomerValues, policy_file.Policy, float]:
    """Customer values for 200 segments of 1,000-10,000 customers and three versions, and a budget of about half of
    what mailing everyone worth mailing (with their best version) would cost."""
    rng = np.random.default_rng(seed)
    sizes = rng.integers(1_000, 10_001, PLAN_SEGMENTS)
    names = np.array([f"segment {s:03d}" for s in range(PLAN_SEGMENTS)], dtype=object)
    centres = rng.uniform(0.0, 3.0, PLAN_SEGMENTS)
    gross = rng.normal(np.repeat(centres, sizes), 1.0)  # what a full piece brings in, before its cost
    piece_cost = np.array([v[1] for v in VERSIONS])
    response = np.array([v[2] for v in VERSIONS])
    values = gross[:, None] * response[None, :] - piece_cost[None, :]
    customers = len(gross)
    best = values.argmax(axis=1)
    worth = values[np.arange(customers), best] > 0
    budget = round(0.5 * float(piece_cost[best][worth].sum()), -3)
    customer_values = values_module.CustomerValues(
        customer_ids=np.arange(customers).astype(str),
        segment=np.repeat(names, sizes),
        p_alive=np.full(customers, 0.5),
        p_buy=rng.uniform(0.0, 0.2, customers),
        values=values,
        suppressed=np.zeros(customers, dtype=bool),
        versions=tuple(v[0] for v in VERSIONS),
        responses=response,
    )
    policy = policy_file.Policy(
        economics=policy_file.Economics(gross_margin=0.45, order_cost=4.0, piece_cost=1.2, annual_discount_rate=0.1, horizon_quarters=HORIZON),
        versions=tuple(policy_file.Version(*v) for v in VERSIONS),
        segments=policy_file.Segments(),
        source="synthetic plan",
    )
    return customer_values, policy, budget


def _attempt(function, *args):
    """Run a solver call; a PlanError (infeasible or stopped) is returned as its message instead of raised."""
    try:
        return function(*args)
    except plan_module.PlanError as exc:
        return str(exc)


def run_plan_program(meter: Meter) -> dict:
    """build_problem, solve_plan and make_plan on the synthetic 200 x 3 values."""
    values, policy, budget = synthetic_values(PLAN_SEED)
    problem = meter.run(f"plan {PLAN_SEGMENTS}x{len(VERSIONS)}: build_problem", plan_module.build_problem, values, policy, budget)
    chunks = sum(len(sizes) for segment in problem.chunk_size for sizes in segment)
    meter.stages[-1].note = f"{len(values.customer_ids):,} customers, {chunks:,} chunks, budget {budget:,.0f}"
    solution = meter.run(f"plan {PLAN_SEGMENTS}x{len(VERSIONS)}: solve_plan", _attempt, plan_module.solve_plan, problem)
    solved = isinstance(solution, plan_module.PlanSolution)
    status = solution.status if solved else solution
    meter.stages[-1].note = f"status {status}" + (f", CBC {solution.solve_seconds:.2f} s, spent {solution.spent:,.0f}" if solved else "")
    solve_stage = meter.stages[-1]
    with CountedCalls(plan_module, "solve_plan") as solves:
        result = meter.run(f"plan {PLAN_SEGMENTS}x{len(VERSIONS)}: make_plan", _attempt, pipeline.plan, values, policy, budget)
    meter.stages[-1].note = f"{solves.calls} solve_plan calls ({max(solves.calls - 1, 0)} shadow-price re-solve), {solves.seconds:.2f} s in them" + (
        "" if isinstance(result, plan_module.Plan) else f"; {result}"
    )
    return {"solve": solve_stage, "make_plan": meter.stages[-1], "status": status, "resolves": max(solves.calls - 1, 0)}


# ---------------------------------------------------------------- targets


def _verdict(value: float, limit: float) -> str:
    return "met" if value < limit else "not met"


def targets(stages: dict[str, Stage], floor: float, fit: dict, solves: list[Stage], plan: dict) -> list[tuple[str, str, str]]:
    """(target, measured figure, met / not met) for each target of the issue."""
    rows = []
    in_process_fit = sum(stages[name].seconds for name in ("read orders and mailings", "build panel", "fit (for the model file)"))
    fit_seconds, fit_how = (stages["lapsewise fit (subprocess)"].seconds, "lapsewise fit") if "lapsewise fit (subprocess)" in stages else (in_process_fit, "in-process read + panel + fit_model")
    rows.append(("fit within 3x floor", f"{fit_seconds / floor:.1f}x ({fit_seconds:.1f} s, {fit_how})", _verdict(fit_seconds / floor, TARGET_RATIO)))
    for name in (f"lapsewise mail-list (subprocess, {DRAWS} draws)", "lapsewise mail-list --plug-in (subprocess)"):
        command = stages.get(name) or stages["sum of mail-list stages"]
        rows.append(("mail-list within 3x floor", f"{command.seconds / floor:.1f}x ({command.seconds:.1f} s, {command.name})", _verdict(command.seconds / floor, TARGET_RATIO)))
    commands = [s for s in stages.values() if "(subprocess" in s.name] or [stages["sum of mail-list stages"]]
    peak = max(commands, key=lambda s: s.peak_mb)
    rows.append(("peak memory under 4 GB", f"{peak.peak_mb:,.0f} MB ({peak.name})", _verdict(peak.peak_mb, TARGET_PEAK_MB)))
    after = fit["after_compression_seconds"]
    rows.append(("fit after compression under 2 s", f"{after:.2f} s (fit_model less its compress; fitted {fit['fitted']})", _verdict(after, TARGET_FIT_AFTER_COMPRESSION)))
    slowest = max(solves, key=lambda s: s.seconds)
    listed = "; ".join(f"{s.name.removeprefix('solve ')} {s.seconds:.2f} s" for s in solves)
    rows.append(("stop-rule program under 1 s for 40 quarters", f"slowest {slowest.seconds:.2f} s ({listed})", _verdict(slowest.seconds, TARGET_STOP_RULE)))
    rows.append(("plan under 5 s for 200 segments and 3 versions", f"solve_plan {plan['solve'].seconds:.2f} s (status {plan['status']})", _verdict(plan["solve"].seconds, TARGET_PLAN)))
    rows.append(("  the same through make_plan", f"{plan['make_plan'].seconds:.2f} s ({plan['resolves']} shadow-price re-solve included)", _verdict(plan["make_plan"].seconds, TARGET_PLAN)))
    return rows


# ---------------------------------------------------------------- main


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0], formatter_class=argparse.RawDescriptionHelpFormatter)
    add_data_options(parser)
    options = parser.parse_args()
    meta, paths = open_data(options)

    meter = Meter()
    floor = measure_floor(meter, paths, options.runs)
    with tempfile.TemporaryDirectory() as folder:
        print("\nStages of mail-list, in this process:")
        out = run_mail_list_stages(meter, paths, meta, options.regenerate, Path(folder))
        command_stages = ("read model and policy", "read orders and mailings", "build panel", "customer values", "plan (no budget)", "mail list assembly", "write CSV")
        by_name = {s.name: s for s in meter.stages}
        meter.stages.append(Stage(
            "sum of mail-list stages", sum(by_name[n].seconds for n in command_stages), max(by_name[n].peak_mb for n in command_stages), float("nan"),
            "what the command runs: compress, posterior and the budget plan are not counted again",
        ))
        gc.collect()
        if not options.no_cli:
            print("\nThe whole commands:")
            meter.stages.append(run_cli(paths, meta["as_of"], options.runs))
            meter.stages.append(run_command_median("lapsewise mail-list --plug-in (subprocess)", [
                "mail-list", str(out["model_path"]), str(paths["orders"]), "--mailings", str(paths["mailings"]), "--plug-in",
                "--policy", str(POLICY), "--as-of", meta["as_of"], "--out", str(Path(folder) / "mail-list-cli.csv"), "--force",
            ], options.runs))
            meter.stages.append(run_command_median(f"lapsewise mail-list (subprocess, {DRAWS} draws)", [
                "mail-list", str(out["model_path"]), str(paths["orders"]), "--mailings", str(paths["mailings"]),
                "--policy", str(POLICY), "--as-of", meta["as_of"], "--out", str(Path(folder) / "mail-list-cli.csv"), "--force",
            ], options.runs))

    print(f"\nThe stop-rule program alone ({HORIZON} quarters):")
    solves = run_stop_rule(meter, out["mail_list_size"], out["model"], out["policy"])
    print(f"\nThe plan integer program ({PLAN_SEGMENTS} segments x {len(VERSIONS)} versions, synthetic values):")
    plan = run_plan_program(meter)

    facts = {
        "customers in the panel": f"{out['customers']:,}",
        "order rows / mailing rows": f"{meta['order_rows']:,} / {meta['mailing_rows']:,}",
        "distinct histories": f"{out['histories']:,}",
        "distinct (history, spend band) states valued": f"{out['program_states']:,}",
        "stop-rule program in customer values (shared tables, then each band)": "; ".join(
            f"{kwargs if isinstance(kwargs, str) else _size(kwargs)}: {seconds:.2f} s" for kwargs, seconds in out["solve_calls"]
        ),
        "segments in the mail-list plan": f"{out['segments']}",
        "mail list decisions": ", ".join(f"{k} {v:,}" for k, v in sorted(out["decisions"].items())),
        "floor (both files)": f"{floor:.2f} s",
        "machine reference (machine_reference: numpy sort and arithmetic)": f"{machine_reference():.2f} s",
        "peak RSS measured by": "VmHWM reset per stage" if meter.exact_peaks else "ru_maxrss growth",
    }
    print()
    print_table(meter.stages, floor, facts)
    rows = targets({s.name: s for s in meter.stages}, floor, out["fit"], solves, plan)
    print("\nTargets:")
    width = max(len(r[0]) for r in rows)
    for target, figure, verdict in rows:
        print(f"  {target:<{width}}  {verdict:<7}  {figure}")
    if options.json:
        options.json.write_text(json.dumps({
            "meta": meta, "floor_seconds": floor, "facts": facts,
            "stages": [s.__dict__ for s in meter.stages],
            "targets": [{"target": t, "figure": f, "verdict": v} for t, f, v in rows],
        }, indent=2, default=float) + "\n")


if __name__ == "__main__":
    main()

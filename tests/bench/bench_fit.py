"""Benchmark of ``lapsewise fit`` on a large simulated base, stage by stage, against a floor.

Run by hand (never collected by pytest, never asserts on time)::

    python tests/bench/bench_fit.py                      # 1,000,000 customers, 40 quarters, ./bench-data
    python tests/bench/bench_fit.py --dir /tmp/bd --regenerate
    python tests/bench/bench_fit.py --profile churn_fit  # cProfile one stage after running what it needs

What it does:

1. Draws the demo scenario with :func:`lapsewise.evaluate.scenario.simulate_base` (seeded, so the
   same options give the same files) and writes ``orders.parquet`` and
   ``mailings.parquet`` into the data folder; existing files are reused unless
   ``--regenerate``. ``order_date`` is written as a Parquet timestamp, as an
   order system exporting Parquet would, not as the text the generator returns.
2. Times, in this one process, each stage of ``fit``: load_orders, load_mailings
   (each alone, for its own cost), load_both (the two read side by side, as ``fit``
   reads them; the sum of stages counts this one), build_panel, compress,
   summarize, expand (the first step of the churn fit, shown on its own),
   fit_churn and fit_spend; then runs the whole command
   ``lapsewise fit`` in a subprocess (under ``/usr/bin/time -v`` when present).
3. Times the floor: reading both Parquet files with ``pyarrow.parquet.read_table``
   and counting rows per customer with pandas ``value_counts``. Every stage is
   printed as a ratio to that floor. The floor and the whole command run
   ``--runs`` times (default 3) and the median run is kept: on a shared machine
   wall times vary by a third or more from run to run.

Peak memory is the process's resident set size. On Linux the high-water mark
(VmHWM) is reset before each stage through ``/proc/self/clear_refs``, so "peak MB"
is the highest RSS reached during that stage (data held from earlier stages
included) and "added MB" is that peak minus the RSS at the stage's start.
Elsewhere the figures fall back to ``ru_maxrss`` growth, which only shows a stage
that raises the process's all-time peak.
"""

from __future__ import annotations

import argparse
import cProfile
import datetime as dt
import gc
import io
import json
import os
import pstats
import re
import resource
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from lapsewise.data import histories as histories_module
from lapsewise.data import panel as panel_module
from lapsewise.data import summary as summary_module
from lapsewise.evaluate.scenario import simulate_base
from lapsewise.files.inputs import load_mailings, load_orders, load_orders_and_mailings
from lapsewise.model import churn, seasons, spend

STAGES = ("load_orders", "load_mailings", "load_both", "build_panel", "compress", "summarize", "expand", "churn_fit", "compress_seasons", "seasons_fit", "spend_fit")
"""The stages of ``fit`` in the order they run; ``expand`` is the first step of ``churn_fit``, also timed on its own;
``compress_seasons`` and ``seasons_fit`` are the seasonal model's (fitted by default, after the plain one it is tested against)."""

_STATUS = Path("/proc/self/status")
_CLEAR_REFS = Path("/proc/self/clear_refs")


# ---------------------------------------------------------------- memory


def _status_mb(key: str) -> float | None:
    try:
        text = _STATUS.read_text()
    except OSError:
        return None
    found = re.search(rf"^{key}:\s+(\d+) kB", text, re.MULTILINE)
    return int(found.group(1)) / 1024 if found else None


def _maxrss_mb() -> float:
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return peak / 1024 / 1024 if sys.platform == "darwin" else peak / 1024  # bytes on macOS, kB on Linux


def _reset_peak() -> bool:
    """Reset the kernel's RSS high-water mark for this process (Linux 4.0+); False where not possible."""
    try:
        with open(_CLEAR_REFS, "w") as handle:
            handle.write("5")
        return True
    except OSError:
        return False


@dataclass
class Stage:
    name: str
    seconds: float
    peak_mb: float
    added_mb: float
    note: str = ""


class Meter:
    """Times a block and measures the RSS it reached."""

    def __init__(self) -> None:
        self.stages: list[Stage] = []
        self.exact_peaks = _reset_peak() and _status_mb("VmHWM") is not None

    def run(self, name: str, function, *args, note: str = "", **kwargs):
        gc.collect()
        if self.exact_peaks:
            _reset_peak()
            start_mb = _status_mb("VmRSS")
        else:
            start_mb = _maxrss_mb()
        began = time.perf_counter()
        result = function(*args, **kwargs)
        seconds = time.perf_counter() - began
        peak_mb = _status_mb("VmHWM") if self.exact_peaks else _maxrss_mb()
        self.stages.append(Stage(name, seconds, peak_mb, peak_mb - start_mb, note))
        print(f"  {name:<32} {seconds:9.2f} s   peak {peak_mb:8.0f} MB  (+{peak_mb - start_mb:.0f})", flush=True)
        return result


# ---------------------------------------------------------------- data


def _data_paths(folder: Path) -> dict[str, Path]:
    return {"orders": folder / "orders.parquet", "mailings": folder / "mailings.parquet", "meta": folder / "meta.json"}


def prepare_data(folder: Path, customers: int, quarters: int, seed: int, regenerate: bool) -> dict:
    """Generate and write the Parquet files unless matching ones are already there; return their description."""
    paths = _data_paths(folder)
    wanted = {"customers": customers, "quarters": quarters, "seed": seed}
    if not regenerate and all(p.exists() for p in paths.values()):
        meta = json.loads(paths["meta"].read_text())
        if {k: meta.get(k) for k in wanted} == wanted:
            print(f"Reusing {paths['orders']} and {paths['mailings']} (pass --regenerate to draw them again).")
            return meta
        sys.exit(f"{folder} holds data for {meta}, not {wanted}; pass --regenerate or another --dir")

    # Draw in a child process so that what the generator leaves behind in memory does not inflate the stages' RSS.
    command = [sys.executable, __file__, "--dir", str(folder), "--customers", str(customers),
               "--quarters", str(quarters), "--seed", str(seed), "--generate-only"]
    subprocess.run(command, check=True)
    return json.loads(paths["meta"].read_text())


def generate(folder: Path, customers: int, quarters: int, seed: int) -> None:
    """Draw the base and write the Parquet files and meta.json (run in its own process)."""
    paths = _data_paths(folder)
    wanted = {"customers": customers, "quarters": quarters, "seed": seed}
    folder.mkdir(parents=True, exist_ok=True)
    paths["meta"].unlink(missing_ok=True)  # written last: its presence says both files are complete
    print(f"Generating {customers:,} customers over {quarters} quarters (seed {seed}) ...", flush=True)
    _reset_peak()
    start_mb = _status_mb("VmRSS") or _maxrss_mb()
    began = time.perf_counter()
    data = simulate_base(customers=customers, quarters=quarters, seed=seed)
    generate_seconds = time.perf_counter() - began
    generate_peak = _status_mb("VmHWM") or _maxrss_mb()
    print(f"  simulate_base: {generate_seconds:.1f} s, peak RSS {generate_peak:.0f} MB (+{generate_peak - start_mb:.0f})", flush=True)

    began = time.perf_counter()
    orders = data.orders.assign(order_date=pd.to_datetime(data.orders["order_date"], format="%Y-%m-%d"))
    _write_parquet(pa.Table.from_pandas(orders, preserve_index=False), paths["orders"])
    _write_parquet(pa.Table.from_pandas(data.mailings, preserve_index=False), paths["mailings"])
    write_seconds = time.perf_counter() - began
    meta = {
        **wanted,
        "as_of": str(data.as_of),
        "order_rows": len(data.orders),
        "mailing_rows": len(data.mailings),
        "simulate_seconds": round(generate_seconds, 2),
        "simulate_peak_mb": round(generate_peak, 1),
        "write_seconds": round(write_seconds, 2),
    }
    paths["meta"].write_text(json.dumps(meta, indent=2) + "\n")
    print(f"  Parquet written in {write_seconds:.1f} s", flush=True)


def _write_parquet(table: pa.Table, path: Path) -> None:
    temporary = path.with_name(path.name + ".tmp")
    pq.write_table(table, temporary)
    os.replace(temporary, path)


# ---------------------------------------------------------------- the floor


def read_and_count(path: Path) -> pd.Series:
    """The least any loader must do: read the file and count its rows per customer."""
    table = pq.read_table(path)
    return table.column("customer_id").to_pandas().value_counts(sort=False)


# ---------------------------------------------------------------- the stages


class CountedCalls:
    """Inside a ``with`` block, replaces ``module.name`` by a wrapper that counts and times its calls.

    The function itself is unchanged; ``durations`` holds the seconds of each call
    and, with ``keep_arguments``, ``arguments`` the ``(args, kwargs)`` of each.
    """

    def __init__(self, module, name: str, keep_arguments: bool = False) -> None:
        self.module, self.name, self.keep_arguments = module, name, keep_arguments
        self.original = getattr(module, name)
        self.durations: list[float] = []
        self.arguments: list[tuple[tuple, dict]] = []

    @property
    def calls(self) -> int:
        return len(self.durations)

    @property
    def seconds(self) -> float:
        return sum(self.durations)

    def __call__(self, *args, **kwargs):
        if self.keep_arguments:
            self.arguments.append((args, kwargs))
        began = time.perf_counter()
        try:
            return self.original(*args, **kwargs)
        finally:
            self.durations.append(time.perf_counter() - began)

    def __enter__(self):
        setattr(self.module, self.name, self)
        return self

    def __exit__(self, *exc):
        setattr(self.module, self.name, self.original)


def run_stages(meter: Meter, paths: dict[str, Path], as_of: str, upto: str | None = None) -> dict:
    """Run the stages of ``fit`` in order, measured; stop after ``upto`` if given. Returns what they produced."""
    out: dict = {}

    def done(name: str) -> bool:
        return upto is not None and STAGES.index(name) >= STAGES.index(upto)

    out["orders"] = meter.run("load_orders", load_orders, paths["orders"])
    if done("load_orders"):
        return out
    out["mailings"] = meter.run("load_mailings", load_mailings, paths["mailings"])
    if done("load_mailings"):
        return out
    del out["orders"], out["mailings"]  # read again, side by side, as fit reads them
    out["orders"], out["mailings"] = meter.run("load_both", load_orders_and_mailings, paths["orders"], paths["mailings"])
    meter.stages[-1].note = "both files read side by side (load_orders_and_mailings), as fit reads them"
    if done("load_both"):
        return out
    out["panel"] = meter.run("build_panel", panel_module.build_panel, out["orders"], out["mailings"], dt.date.fromisoformat(as_of), 1)
    if done("build_panel"):
        return out
    out["histories"] = meter.run("compress", histories_module.compress, out["panel"])
    if done("compress"):
        return out
    out["summary"] = meter.run("summarize", summary_module.summarize, out["panel"])
    if done("summarize"):
        return out
    expansion = meter.run("expand (inside churn fit)", churn.expand, out["histories"])
    out["cells"] = expansion.cells
    if done("expand"):
        out["expansion"] = expansion
        return out
    del expansion  # fit_churn builds its own; holding this one would inflate the fit's memory figure
    with CountedCalls(churn, "total_gradient", keep_arguments=True) as counter, CountedCalls(churn, "total_hessian") as hessians:
        out["churn"] = meter.run("churn_fit", churn.fit_churn, out["histories"], out["panel"].mailing_history)
    # Evaluations on all the histories, and on the stand-in (a sample of customers) the search scouts on.
    full = [seconds for (args, _), seconds in zip(counter.arguments, counter.durations) if args[0].histories.size == out["histories"].size]
    scouting = counter.calls - len(full)
    meter.stages[-1].note = (
        f"{len(full)} evaluations of the full likelihood ({sum(full) / max(len(full), 1):.2f} s each), "
        f"{scouting} of the stand-in ({(counter.seconds - sum(full)) / max(scouting, 1):.3f} s each), "
        f"{hessians.calls} exact Hessian{'s' if hessians.calls != 1 else ''} of the full likelihood ({hessians.seconds / max(hessians.calls, 1):.2f} s each)"
    )
    out["gradient_calls"] = f"{len(full)} on all histories, {scouting} on the stand-in sample"
    if done("churn_fit"):
        return out
    out["seasonal_histories"] = meter.run("compress_seasons", histories_module.compress, out["panel"], True)
    if done("compress_seasons"):
        return out
    out["seasonal_churn"] = meter.run("seasons_fit", seasons.fit_seasons, out["seasonal_histories"], out["panel"].mailing_history, out["churn"])
    meter.stages[-1].note = f"{out['seasonal_histories'].size:,} distinct seasonal histories"
    if done("seasons_fit"):
        return out
    summary = out["summary"]
    out["spend"] = meter.run("spend_fit", spend.fit_spend, summary.x, summary.mean_repeat_value)
    return out


def run_command(label: str, arguments: list[str]) -> Stage:
    """A ``lapsewise`` command in a fresh process (``python -m lapsewise ARGUMENTS``): wall time and peak RSS."""
    command = [sys.executable, "-m", "lapsewise", *arguments]
    timer = Path("/usr/bin/time").exists()
    if timer:
        command = ["/usr/bin/time", "-v", *command]
    before = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    began = time.perf_counter()
    finished = subprocess.run(command, capture_output=True, text=True)
    seconds = time.perf_counter() - began
    if finished.returncode != 0:
        print(finished.stdout[-3000:], finished.stderr[-3000:], sep="\n")
        raise SystemExit(f"{label} failed with exit code {finished.returncode}")
    found = re.search(r"Maximum resident set size \(kbytes\): (\d+)", finished.stderr) if timer else None
    if found:
        peak_mb = int(found.group(1)) / 1024
        how = "/usr/bin/time -v"
    else:
        # ru_maxrss of children is the largest child so far; valid when this child is the largest.
        peak_mb = max(resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss, before) / 1024
        how = "getrusage(RUSAGE_CHILDREN)"
    print(f"  {label:<32} {seconds:9.2f} s   peak {peak_mb:8.0f} MB  ({how})", flush=True)
    return Stage(label, seconds, peak_mb, float("nan"), f"peak by {how}")


def median_stage(runs: list[Stage]) -> Stage:
    """The run with the median time (the upper one of an even count), its note saying how the runs spread.

    Wall times on a shared machine vary by a third or more from run to run, so the
    floor and the whole commands, which the targets are ratios of, are run several times.
    """
    ordered = sorted(runs, key=lambda s: s.seconds)
    middle = ordered[len(ordered) // 2]
    if len(runs) == 1:
        return middle
    spread = f"median of {len(runs)} runs ({ordered[0].seconds:.2f} to {ordered[-1].seconds:.2f} s)"
    return Stage(middle.name, middle.seconds, max(s.peak_mb for s in runs), middle.added_mb, f"{spread}; {middle.note}".rstrip("; "))


def run_command_median(label: str, arguments: list[str], runs: int) -> Stage:
    """:func:`run_command` ``runs`` times; the median run."""
    return median_stage([run_command(label, arguments) for _ in range(runs)])


def run_cli(paths: dict[str, Path], as_of: str, runs: int = 1) -> Stage:
    """The whole ``lapsewise fit`` command in a fresh process (the median of ``runs``): wall time and peak RSS."""
    with tempfile.TemporaryDirectory() as folder:
        return run_command_median("lapsewise fit (subprocess)", [
            "fit", str(paths["orders"]), "--mailings", str(paths["mailings"]), "--as-of", as_of,
            "--out", str(Path(folder) / "model.json"), "--force",
        ], runs)


# ---------------------------------------------------------------- report


def print_table(stages: list[Stage], floor_seconds: float, facts: dict[str, str]) -> None:
    """Plain text, so that it can be pasted into a note or an issue as it is."""
    name_width = max(len(s.name) for s in stages)
    header = f"{'stage':<{name_width}}  {'seconds':>9}  {'peak RSS MB':>11}  {'added MB':>8}  {'x floor':>8}  note"
    print(header)
    print("-" * len(header))
    for stage in stages:
        added = "" if np.isnan(stage.added_mb) else f"{stage.added_mb:,.0f}"
        print(
            f"{stage.name:<{name_width}}  {stage.seconds:9,.2f}  {stage.peak_mb:11,.0f}  {added:>8}  "
            f"{stage.seconds / floor_seconds:8,.1f}  {stage.note}"
        )
    print()
    for key, value in facts.items():
        print(f"{key}: {value}")


_PROFILE_NEEDS = {
    "load_orders": None,
    "load_mailings": None,
    "load_both": None,
    "build_panel": "load_both",
    "compress": "build_panel",
    "summarize": "build_panel",
    "expand": "compress",
    "churn_fit": "compress",
    "compress_seasons": "build_panel",
    "seasons_fit": "churn_fit",
    "spend_fit": "summarize",
}


def profile_stage(paths: dict[str, Path], as_of: str, stage: str, lines: int) -> None:
    """Run, unprofiled, the stages that ``stage`` needs, then ``stage`` under cProfile; print the top functions."""
    needs = _PROFILE_NEEDS[stage]
    out = run_stages(Meter(), paths, as_of, upto=needs) if needs else {}
    calls = {
        "load_orders": lambda: load_orders(paths["orders"]),
        "load_mailings": lambda: load_mailings(paths["mailings"]),
        "load_both": lambda: load_orders_and_mailings(paths["orders"], paths["mailings"]),
        "build_panel": lambda: panel_module.build_panel(out["orders"], out["mailings"], dt.date.fromisoformat(as_of), 1),
        "compress": lambda: histories_module.compress(out["panel"]),
        "summarize": lambda: summary_module.summarize(out["panel"]),
        "expand": lambda: churn.expand(out["histories"]),
        "churn_fit": lambda: churn.fit_churn(out["histories"], out["panel"].mailing_history),
        "compress_seasons": lambda: histories_module.compress(out["panel"], True),
        "seasons_fit": lambda: seasons.fit_seasons(histories_module.compress(out["panel"], True), out["panel"].mailing_history, out["churn"]),
        "spend_fit": lambda: spend.fit_spend(out["summary"].x, out["summary"].mean_repeat_value),
    }
    profiler = cProfile.Profile()
    began = time.perf_counter()
    profiler.runcall(calls[stage])
    print(f"\n{stage} under cProfile: {time.perf_counter() - began:.2f} s (profiling adds some overhead)")
    for key in ("tottime", "cumulative"):
        buffer = io.StringIO()
        pstats.Stats(profiler, stream=buffer).sort_stats(key).print_stats(lines)
        print(f"\n--- top {lines} by {key}")
        print(buffer.getvalue())


def add_data_options(parser: argparse.ArgumentParser) -> None:
    """The options every benchmark on the simulated base shares: where the data live, how they are drawn, what to skip."""
    parser.add_argument("--dir", type=Path, default=Path("bench-data"), help="data folder (default ./bench-data)")
    parser.add_argument("--regenerate", action="store_true", help="draw the data again even if the files exist")
    parser.add_argument("--customers", type=int, default=1_000_000)
    parser.add_argument("--quarters", type=int, default=40)
    parser.add_argument("--seed", type=int, default=20240601)
    parser.add_argument("--no-cli", action="store_true", help="skip the 'lapsewise' subprocesses")
    parser.add_argument("--json", type=Path, help="also write the figures to this JSON file")
    parser.add_argument("--runs", type=int, default=3, help="run the floor and each whole command this many times and keep the median (default 3)")


def open_data(options: argparse.Namespace) -> tuple[dict, dict[str, Path]]:
    """Draw or reuse the data the options describe, say what they are, and return their description and paths."""
    meta = prepare_data(options.dir, options.customers, options.quarters, options.seed, options.regenerate)
    paths = _data_paths(options.dir)
    print(f"orders.parquet: {meta['order_rows']:,} rows ({paths['orders'].stat().st_size / 2**20:.0f} MB); "
          f"mailings.parquet: {meta['mailing_rows']:,} rows ({paths['mailings'].stat().st_size / 2**20:.0f} MB); as of {meta['as_of']}")
    return meta, paths


def measure_floor(meter: Meter, paths: dict[str, Path], runs: int = 1) -> float:
    """Warm the page cache, then time the floor on both files, the median of ``runs`` each; returns its seconds
    (both stages stay in ``meter``)."""
    for path in (paths["orders"], paths["mailings"]):
        path.read_bytes()  # so that the floor and the stages read from the same place
    print("\nFloor (pyarrow read_table + pandas value_counts on customer_id):")
    for name in ("orders", "mailings"):
        for _ in range(runs):
            meter.run(f"floor: {name}", read_and_count, paths[name])
        meter.stages[-runs:] = [median_stage(meter.stages[-runs:])]
    return meter.stages[-2].seconds + meter.stages[-1].seconds


def machine_reference() -> float:
    """Seconds for a fixed numpy workload (sort 10 million doubles, then 20 multiply-adds over them), best of three.

    Printed beside the figures so that runs on different machines, or on one
    machine whose speed varies, can be compared; it is not part of any ratio.
    """
    values = np.random.default_rng(0).random(10_000_000)
    best = float("inf")
    for _ in range(3):
        start = time.perf_counter()
        work = np.sort(values)
        for _ in range(20):
            work = work * 1.0000001 + 1e-9
        best = min(best, time.perf_counter() - start)
    return best


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0], formatter_class=argparse.RawDescriptionHelpFormatter)
    add_data_options(parser)
    parser.add_argument("--profile", choices=STAGES,
                        help="instead of the benchmark, profile this stage with cProfile")
    parser.add_argument("--profile-lines", type=int, default=25)
    parser.add_argument("--generate-only", action="store_true", help=argparse.SUPPRESS)  # prepare_data's child process
    options = parser.parse_args()
    if options.generate_only:
        generate(options.dir, options.customers, options.quarters, options.seed)
        return

    meta, paths = open_data(options)
    if options.profile:
        profile_stage(paths, meta["as_of"], options.profile, options.profile_lines)
        return

    meter = Meter()
    floor = measure_floor(meter, paths, options.runs)
    print("\nStages of fit, in this process:")
    out = run_stages(meter, paths, meta["as_of"])
    counted = [s for s in meter.stages[2:] if not s.name.startswith("expand") and s.name not in ("load_orders", "load_mailings")]
    note = "load_both stands for the two loads; expand is counted inside churn_fit"
    meter.stages.append(Stage("sum of stages", sum(s.seconds for s in counted), max(s.peak_mb for s in meter.stages[2:]), float("nan"), note))
    if not options.no_cli:
        print("\nThe whole command:")
        meter.stages.append(run_cli(paths, meta["as_of"], options.runs))

    histories = out["histories"]
    panel = out["panel"]
    cells = out["cells"]
    facts = {
        "customers in the panel": f"{panel.customers:,} ({panel.purchased.shape[1]} quarter columns)",
        "order rows / mailing rows": f"{meta['order_rows']:,} / {meta['mailing_rows']:,}",
        "distinct histories": f"{histories.size:,} ({panel.customers / histories.size:.1f} customers each on average)",
        "likelihood cells (expand(histories).cells)": f"{cells:,}",
        "churn gradient evaluations": f"{out['gradient_calls']}",
        "repeat customers in the spend fit": f"{out['spend'].customers:,}",
        "floor (both files)": f"{floor:.2f} s",
        "machine reference (machine_reference: numpy sort and arithmetic)": f"{machine_reference():.2f} s",
        "simulate_base (when the data were drawn)": f"{meta['simulate_seconds']} s, peak RSS {meta['simulate_peak_mb']:.0f} MB",
        "peak RSS measured by": "VmHWM reset per stage" if meter.exact_peaks else "ru_maxrss growth",
    }
    print()
    print_table(meter.stages, floor, facts)
    if options.json:
        options.json.write_text(json.dumps({
            "meta": meta, "floor_seconds": floor, "distinct_histories": histories.size, "likelihood_cells": cells,
            "stages": [s.__dict__ for s in meter.stages],
        }, indent=2, default=float) + "\n")


if __name__ == "__main__":
    main()

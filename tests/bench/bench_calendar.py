"""Benchmark of the calendar program against the single-piece program, at the stop table's size.

Run by hand (never collected by pytest, never asserts on time)::

    python tests/bench/bench_calendar.py            # 40 quarters, 3 runs each, median kept
    python tests/bench/bench_calendar.py --runs 1 --horizon 20

What it times, in this one process:

1. ``single piece``: :func:`lapsewise.decide.program.solve` for the stop table's states (40 quarters ahead,
   customers up to 80 quarters old, rho 0.3), the program every stop table solved before the calendar.
2. ``calendar, 1 version``: :func:`lapsewise.decide.calendar.solve_calendar` with no seasons and one piece, on
   the same states (b up to 0 at the decision layers): what the grid in P(alive) costs by itself.
3. ``calendar, 4 seasons x 3 versions``: seasons 1 / 0.5 / 0.375 / 0.625 and three versions with a dearer
   fourth quarter, on the states the stop table needs with seasons (b up to the horizon: a history's silences
   spread its belief over b), 43 layers (to the same quarter of the year).
4. ``stop table, 4 seasons x 3 versions``: the whole table for one spend band, plans followed through every
   row's silent quarters.

Each figure is printed with its ratio to ``single piece``; the issue's target is the stop table within 5 times.
The machine reference (a fixed numpy workload) lets runs on different days be compared.
"""

from __future__ import annotations

import argparse
import statistics
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).parent))

from bench_fit import machine_reference  # noqa: E402

from lapsewise.decide import calendar as cal  # noqa: E402
from lapsewise.decide.program import solve  # noqa: E402
from lapsewise.decide.stop_table import build_stop_table  # noqa: E402
from lapsewise.files.policy_file import Economics, Version  # noqa: E402
from lapsewise.model.churn import ChurnFit  # noqa: E402
from lapsewise.model.process import Process  # noqa: E402

SEASONS = (1.0, 0.5, 0.375, 0.625)
VERSIONS = (
    Version("full", 1.5, quarter_piece_costs=(None, None, None, 2.1)),
    Version("slim", 0.95, response=0.8),
    Version("postcard", 0.4, response=0.45),
)


def timed(runs: int, work) -> float:
    """The median wall time of ``runs`` calls."""
    times = []
    for _ in range(runs):
        started = time.perf_counter()
        work()
        times.append(time.perf_counter() - started)
    return statistics.median(times)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--horizon", type=int, default=40)
    parser.add_argument("--runs", type=int, default=3)
    args = parser.parse_args()
    h, d = args.horizon, 1.12**-0.25
    plain = Process(0.8, 3.0, 0.5, 4.0, 0.3)
    seasonal = Process(0.8, 3.0, 0.5, 4.0, 0.3, SEASONS)
    economics = Economics(0.42, 5.5, 1.5, 0.12, h, order_value=45.0, quarters=((), (), (), (("piece_cost", 2.1),)))
    one = cal.Calendar((1.0,) * 4, (economics.margin(45.0),) * 4, (cal.Choice("full", 1.0, (1.5,) * 4),))
    many = cal.calendar_for(seasonal, economics, VERSIONS, 45.0)
    fit = ChurnFit(alpha=0.8, beta=3.0, gamma=0.5, delta=4.0, rho=0.3, seasons=SEASONS)
    figures = {
        "single piece": timed(args.runs, lambda: solve(plain, economics.margin(45.0), 1.5, d, h, n_max=2 * h, b_max=0, x_max=h)),
        "calendar, 1 version": timed(args.runs, lambda: cal.solve_calendar(plain, one, d, h, h, n_max=2 * h, b_max=0, x_max=h, keep=(h - 1,))),
        "calendar, 4 seasons x 3 versions": timed(
            args.runs, lambda: cal.solve_calendar(seasonal, many, d, h + 3, h + 3, n_max=2 * h, b_max=h, x_max=h, keep=tuple(range(h - 1, h + 3)))
        ),
        "stop table, 4 seasons x 3 versions (one band)": timed(args.runs, lambda: build_stop_table(fit, None, economics, versions=VERSIONS)),
    }
    base = figures["single piece"]
    print(f"Stop-table programs, {h} quarters ahead, rho 0.3 (median of {args.runs} runs)")
    for name, seconds in figures.items():
        print(f"  {name:<48} {seconds:7.2f} s   {seconds / base:5.1f}x")
    ratio = figures["stop table, 4 seasons x 3 versions (one band)"] / base
    print(f"  target: the stop table within 5x the single piece: {'met' if ratio <= 5 else 'not met'} ({ratio:.1f}x)")
    print(f"  machine reference (machine_reference: numpy sort and arithmetic): {machine_reference():.2f} s")


if __name__ == "__main__":
    main()

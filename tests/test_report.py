"""The report: a self-contained HTML page whose numbers are the commands' own, rendered by a real browser.

Every input is the invented demo scenario (the session fixture ``demo_dir``: 3,000
customers of an imaginary garden-seed catalog over 16 quarters, seed 3). The
report and the commands it is compared with run with the same overrides: an
8-quarter horizon (to keep them quick) and a budget of 500, which the demo base
spends in full, so that the budget binds and its shadow price is positive.
"""

from __future__ import annotations

import json
import subprocess
import tempfile
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
from conftest import assert_one_error_line, run_cli

from lapsewise.app.report import TITLES, holdout_quarters

CHROMIUM = Path("/usr/bin/chromium")
OVERRIDES = ("--horizon-quarters", "8")
BUDGET = "500"
VOID = {"area", "base", "br", "col", "embed", "hr", "img", "input", "link", "meta", "source", "track", "wbr"}
REFERENCE_ATTRIBUTES = {"src", "href", "xlink:href", "action", "data", "poster", "srcset", "formaction", "background"}


class Page(HTMLParser):
    """Reads the report: the tags in order, the nesting, the headings, the numbers marked with data-key, every reference."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.stack: list[str] = []
        self.mismatched: list[tuple[str, str | None]] = []
        self.tags: list[str] = []
        self.references: list[tuple[str, str, str]] = []
        self.headings: list[str] = []
        self.numbers: dict[str, str] = {}
        self.texts: list[str] = []
        self._heading: list[str] | None = None
        self._number: tuple[str, list[str]] | None = None

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        for name, value in attrs:
            if name in REFERENCE_ATTRIBUTES or name.startswith("on"):
                self.references.append((tag, name, value or ""))
        attributes = dict(attrs)
        if tag == "h2":
            self._heading = []
        if "data-key" in attributes:
            self._number = (attributes["data-key"], [])
        if tag not in VOID:
            self.stack.append(tag)

    def handle_startendtag(self, tag, attrs):
        self.tags.append(tag)
        for name, value in attrs:
            if name in REFERENCE_ATTRIBUTES or name.startswith("on"):
                self.references.append((tag, name, value or ""))

    def handle_endtag(self, tag):
        top = self.stack.pop() if self.stack else None
        if top != tag:
            self.mismatched.append((tag, top))
        if tag == "h2" and self._heading is not None:
            self.headings.append("".join(self._heading))
            self._heading = None
        if tag == "span" and self._number is not None:
            key, parts = self._number
            self.numbers[key] = "".join(parts)
            self._number = None

    def handle_data(self, data):
        self.texts.append(data)
        if self._heading is not None:
            self._heading.append(data)
        if self._number is not None:
            self._number[1].append(data)


def parse(text: str) -> Page:
    page = Page()
    page.feed(text)
    page.close()
    return page


def number(text: str) -> float:
    return float(text.replace(",", ""))


def run_json(*args) -> dict:
    result = run_cli(*args, "--json")
    assert result.code == 0, result.stderr
    return json.loads(result.stdout)


@pytest.fixture(scope="module")
def report(demo_dir, tmp_path_factory) -> tuple[Path, str]:
    """The report of the demo base written by ``lapsewise report`` (its path and text)."""
    out = tmp_path_factory.mktemp("report") / "report.html"
    result = run_cli(
        "report", demo_dir / "model.json", demo_dir / "orders.csv", "--mailings", demo_dir / "mailings.csv",
        "--policy", demo_dir / "policy.toml", "--budget", BUDGET, *OVERRIDES, "--out", out,
    )
    assert result.code == 0, result.stderr
    assert f"Report written to {out}" in result.stdout
    return out, out.read_text(encoding="utf-8")


def test_the_report_parses_with_balanced_tags(report):
    page = parse(report[1])
    # Every element closed in order, none left open: the page is well formed for Python's html.parser.
    assert page.mismatched == []
    assert page.stack == []
    assert page.tags[0] == "html"


def test_the_report_references_nothing_outside_itself(report):
    page = parse(report[1])
    # No element that loads something else, no script at all.
    for tag in ("link", "script", "iframe", "img", "object", "embed", "base"):
        assert tag not in page.tags, tag
    # The only references are the SVGs' own: their clip paths ("#id") and the shaded grids' pixels, inline as data.
    assert page.references, "the inline SVGs refer to their own clip paths"
    for tag, name, value in page.references:
        assert value.startswith("#") or (tag == "image" and value.startswith("data:image/png;base64,")), (tag, name, value[:40])
    text = report[1]
    assert "@import" not in text
    assert "url(" not in text.replace("url(#", "")
    # "://" appears only in the SVG namespace declarations (names, never fetched).
    without_namespaces = text.replace('xmlns="http://www.w3.org/2000/svg"', "").replace('xmlns:xlink="http://www.w3.org/1999/xlink"', "")
    assert "://" not in without_namespaces


def test_every_figure_is_present_with_its_title(report):
    page = parse(report[1])
    # Seven sections in the order, six of them figures (the seventh is tables and words).
    assert page.headings == list(TITLES.values())
    assert page.tags.count("svg") == 6
    assert page.tags.count("figure") == 6
    assert page.tags.count("figcaption") == 6
    text = report[1]
    for axis_label in (
        "Silent quarters since the last purchase (quarters)",
        "P(order next quarter) (%)",
        "Chance of an order next quarter if mailed (%)",
        "Mail budget this quarter (currency units)",
        "Repeat purchases (count)",
        "Discounted profit per customer (currency units)",
    ):
        assert axis_label in text, axis_label


def test_the_plan_numbers_equal_plan_json(report, demo_dir):
    page = parse(report[1])
    plan = run_json(
        "plan", demo_dir / "model.json", demo_dir / "orders.csv", "--mailings", demo_dir / "mailings.csv",
        "--policy", demo_dir / "policy.toml", "--budget", BUDGET, *OVERRIDES,
    )
    # The report prints currency to the cent and the shadow price to 4 decimals; plan --json rounds to 4 and 6.
    assert number(page.numbers["plan.budget"]) == float(BUDGET)
    assert abs(number(page.numbers["plan.expected_profit"]) - plan["expected_profit"]) <= 0.005 + 1e-9
    assert abs(number(page.numbers["plan.spent"]) - plan["spent"]) <= 0.005 + 1e-9
    assert plan["shadow_price"] > 0  # the budget binds on this base, so the marked shadow price means something
    assert abs(number(page.numbers["plan.shadow_price"]) - plan["shadow_price"]) <= 0.00005 + 1e-9
    assert number(page.numbers["plan.suppressed"]) == 0  # no --suppress


def test_the_stop_points_equal_stop_table_json(report, demo_dir):
    page = parse(report[1])
    table = run_json("stop-table", demo_dir / "model.json", "--policy", demo_dir / "policy.toml", *OVERRIDES)
    stops = {(r["spend_band"], r["frequency"], r["last_purchase_quarter"]): r for r in table["rows"]}
    shown = [key for key in page.numbers if key.startswith("stop.")]
    # The demo policy has 3 spend bands; the report shows 9 (x, t_x) rows of each at an 8-quarter horizon (x = 0, 1, 2, 3, 4, 6, 8).
    assert len(table["spend_bands"]) == 3
    assert len(shown) == 3 * 7
    for key in shown:
        _, band, x, t_x = key.split(".")
        row = stops[(band, int(x), int(t_x))]
        for field, prefix in (("stop_after", "stop"), ("breakeven_stop_after", "breakeven")):
            expected = "never (mailed throughout)" if row[field] is None else str(row[field])
            assert page.numbers[f"{prefix}.{band}.{x}.{t_x}"] == expected, key


def test_the_backtest_numbers_equal_backtest_json(report, demo_dir):
    page = parse(report[1])
    holdout = int(page.numbers["backtest.holdout"])
    # The demo base covers 16 quarters; the report holds out a quarter of them, at most 4.
    assert holdout == holdout_quarters(16) == 4
    result = run_json("backtest", demo_dir / "orders.csv", "--mailings", demo_dir / "mailings.csv", "--holdout-quarters", holdout)
    assert number(page.numbers["backtest.actual"]) == result["actual_repeat_purchases"]
    assert abs(number(page.numbers["backtest.predicted"]) - result["predicted_repeat_purchases"]) <= 0.05 + 1e-9
    assert len(result["by_quarter"]) == holdout
    for row in result["by_quarter"]:
        assert number(page.numbers[f"backtest.quarter.{row['quarter']}.actual"]) == row["actual"]
        assert abs(number(page.numbers[f"backtest.quarter.{row['quarter']}.predicted"]) - row["predicted"]) <= 0.05 + 1e-9


def test_the_policy_comparison_equals_simulate_json(report, demo_dir):
    page = parse(report[1])
    # The report simulates as 'simulate' does by default: 10,000 customers, seed 1, over the horizon.
    result = run_json("simulate", demo_dir / "model.json", "--policy", demo_dir / "policy.toml", *OVERRIDES)
    assert result["customers"] == 10_000 and result["seed"] == 1
    for row in result["policies"]:
        assert abs(number(page.numbers[f"simulation.{row['policy']}.mean_profit"]) - row["mean_profit"]) <= 0.005 + 1e-9
        if row["policy"] != "optimal":
            assert abs(number(page.numbers[f"simulation.{row['policy']}.difference"]) - row["difference_to_optimal"]) <= 0.005 + 1e-9


def test_the_parameters_equal_the_model_file(report, demo_dir):
    page = parse(report[1])
    churn = json.loads((demo_dir / "model.json").read_text())["churn"]
    for name in ("alpha", "beta", "gamma", "delta", "rho"):
        assert page.numbers[f"model.{name}"] == f"{churn[name]:.4g}", name
    for q in range(4):  # the demo's model is fitted with seasons (the default)
        assert page.numbers[f"model.season_{q + 1}"] == f"{churn['seasons'][q]:.4g}", q


def test_the_report_holds_the_cautions_and_assumptions(report):
    text = " ".join(parse(report[1]).texts)
    for words in ("personal data", "suppression", "local law", "not a guarantee", "Assumptions in plain words", "Left out or repaired"):
        assert words in text, words
    assert "No suppression list was given" in text  # the report ran without --suppress
    assert "@media print" in report[1] and "@page" in report[1]


def test_the_report_refuses_to_overwrite_without_force(report, demo_dir):
    out, before = report
    args = ("report", demo_dir / "model.json", demo_dir / "orders.csv", "--policy", demo_dir / "policy.toml", "--out", out)
    assert_one_error_line(run_cli(*args), str(out), "--force")
    assert out.read_text(encoding="utf-8") == before


def test_a_bad_policy_writes_nothing(demo_dir, tmp_path):
    out = tmp_path / "report.html"
    result = run_cli("report", demo_dir / "model.json", demo_dir / "orders.csv", "--policy", tmp_path / "missing.toml", "--out", out)
    assert_one_error_line(result, "missing.toml")
    assert not out.exists()


def test_the_demo_writes_its_report(demo_dir):
    page = parse((demo_dir / "report.html").read_text(encoding="utf-8"))
    assert page.headings == list(TITLES.values())
    assert page.tags.count("svg") == 6
    # The demo's backtest holds out 16 // 4 = 4 quarters, as its terminal output says.
    assert page.numbers["backtest.holdout"] == "4"


def chromium(*args: str) -> subprocess.CompletedProcess:
    """Run headless Chromium with a fresh profile and no network features."""
    assert CHROMIUM.exists(), "Chromium is missing: apt-get install -y chromium (.ci/run installs it)"
    with tempfile.TemporaryDirectory() as profile:
        return subprocess.run(
            [str(CHROMIUM), "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
             "--disable-background-networking", "--disable-component-update", "--disable-sync", f"--user-data-dir={profile}",
             "--enable-logging=stderr", "--v=0", *args],
            capture_output=True, text=True, timeout=180,
        )


def test_a_real_browser_renders_the_report(report, tmp_path):
    import matplotlib.image

    out = report[0]
    shot = tmp_path / "shot.png"
    done = chromium(f"--screenshot={shot}", "--window-size=1200,3000", out.as_uri())
    assert done.returncode == 0, done.stderr[-2000:]
    console_errors = [line for line in done.stderr.splitlines() if "Uncaught" in line or "ERROR:CONSOLE" in line]
    assert console_errors == []
    pixels = matplotlib.image.imread(shot)
    assert pixels.shape[:2] == (3000, 1200)
    colours = np.unique((255 * pixels[..., :3]).round().astype(np.uint8).reshape(-1, 3), axis=0)
    # A blank page has 1 colour and a page of text a few dozen; the shaded grids and heat maps give hundreds.
    assert len(colours) > 300
    not_white = (pixels[..., :3] < 0.95).any(axis=2).mean()
    assert not_white > 0.05
    dom = chromium("--dump-dom", out.as_uri())
    assert dom.returncode == 0, dom.stderr[-2000:]
    # The browser's own document holds the six figures and every title.
    assert dom.stdout.count("<svg") == 6
    for title in TITLES.values():
        assert title.replace("&", "&amp;") in dom.stdout


def test_a_suppression_list_is_counted_and_named(demo_dir, tmp_path):
    # 20 ids taken from the demo's orders file: all 20 are customers, so the plan holds back exactly 20.
    ids = sorted({line.split(",")[0] for line in (demo_dir / "orders.csv").read_text().splitlines()[1:]})[:20]
    listed = tmp_path / "suppress.csv"
    listed.write_text("customer_id\n" + "".join(f"{i}\n" for i in ids))
    out = tmp_path / "report.html"
    result = run_cli(
        "report", demo_dir / "model.json", demo_dir / "orders.csv", "--mailings", demo_dir / "mailings.csv",
        "--policy", demo_dir / "policy.toml", "--suppress", listed, "--horizon-quarters", "6", "--out", out,
    )
    assert result.code == 0, result.stderr
    page = parse(out.read_text(encoding="utf-8"))
    assert page.numbers["plan.suppressed"] == "20"
    assert page.numbers["plan.budget"] == "no limit"  # no --budget: everyone worth mailing is mailed
    assert f"Suppression list {listed}: 20 of its 20 ids are customers here" in " ".join(page.texts)

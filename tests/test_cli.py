"""The commands end to end, run as a user would run them: on a small demo scenario, and on bad input
(exit code 2, one line on stderr naming the file, never a traceback)."""

import json

import pandas as pd
import pytest
from hypothesis import given

from builders import run
from conftest import ANY_FILE, ANY_FILE_SETTINGS, BAD_INPUTS, GOOD_ORDERS, assert_one_error_line, file_holding, mailings_text, orders_text, run_cli, run_cli_process


def test_fit_writes_model_and_refuses_to_overwrite(demo_dir, tmp_path):
    out = tmp_path / "model.json"
    result = run("fit", demo_dir / "orders.csv", "--mailings", demo_dir / "mailings.csv", "--out", out)
    assert result.returncode == 0, result.stderr
    model = json.loads(out.read_text())
    assert model["mailing_history"] is True and model["churn"]["rho"] is not None
    assert "Lapse curve" in result.stdout
    again = run("fit", demo_dir / "orders.csv", "--out", out)
    assert again.returncode == 2 and "already exists" in again.stderr
    forced = run("fit", demo_dir / "orders.csv", "--out", out, "--force")
    assert forced.returncode == 0
    # Without a mailings file rho is not estimated and the output says every quarter counts as mailed.
    assert json.loads(out.read_text())["churn"]["rho"] is None
    assert "counted as mailed" in forced.stdout
    # Seasons are fitted by default and tested against none; --no-seasons writes multipliers of 1 and no test.
    assert "Seasons against none: likelihood-ratio statistic" in result.stdout
    assert len(model["churn"]["seasons"]) == 4 and max(model["churn"]["seasons"]) == 1.0
    assert model["season_test"]["degrees_of_freedom"] == 3
    plain = run("fit", demo_dir / "orders.csv", "--mailings", demo_dir / "mailings.csv", "--out", out, "--force", "--no-seasons")
    assert plain.returncode == 0, plain.stderr
    data = json.loads(out.read_text())
    assert data["churn"]["seasons"] == [1.0, 1.0, 1.0, 1.0] and data["season_test"] is None
    assert "Seasons against none" not in plain.stdout


def test_backtest_json_is_stable_and_has_its_keys(demo_dir):
    args = ("backtest", demo_dir / "orders.csv", "--mailings", demo_dir / "mailings.csv", "--holdout-quarters", 3, "--json")
    first, second = run(*args), run(*args)
    assert first.returncode == 0, first.stderr
    assert first.stdout == second.stdout
    data = json.loads(first.stdout)
    assert data["holdout_quarters"] == 3
    assert data["actual_repeat_purchases"] >= 0 and data["predicted_repeat_purchases"] > 0


def test_score_writes_one_row_per_customer(demo_dir, tmp_path):
    out = tmp_path / "scores.csv"
    result = run("score", demo_dir / "model.json", demo_dir / "orders.csv", "--mailings", demo_dir / "mailings.csv", "--out", out)
    assert result.returncode == 0, result.stderr
    lines = out.read_text().splitlines()
    assert lines[0] == "customer_id,x,t_x,n,silent_quarters,p_alive,p_buy,expected_orders,dert,expected_order_value"
    model = json.loads((demo_dir / "model.json").read_text())
    assert len(lines) - 1 == model["customers"]


def test_score_with_a_policy_adds_the_plans_figures_and_says_which_is_which(demo_dir, tmp_path):
    out = tmp_path / "scores.csv"
    common = ("score", demo_dir / "model.json", demo_dir / "orders.csv", "--mailings", demo_dir / "mailings.csv", "--policy", POLICY)
    result = run(*common, "--horizon", 4, "--out", out)
    assert result.returncode == 0, result.stderr
    scores = pd.read_csv(out)
    assert list(scores.columns[-2:]) == ["expected_orders_planned", "dert_planned"]
    assert scores["expected_orders_planned"].sum() < scores["expected_orders"].sum()
    text = " ".join(result.stdout.split())
    assert "assume a piece every quarter" in text and "expected_orders_planned and dert_planned follow the stop rule's own plan" in text
    # The plan looks horizon_quarters ahead: a longer window is refused in one line.
    refused = run(*common, "--horizon", 400, "--out", tmp_path / "other.csv")
    assert refused.returncode == 2 and "--horizon 400" in refused.stderr and "Traceback" not in refused.stderr


def test_model_argument_errors_are_one_line(tmp_path, demo_dir):
    bad = tmp_path / "bad.json"
    bad.write_text("{}")
    result = run("score", bad, demo_dir / "orders.csv", "--out", tmp_path / "s.csv")
    assert result.returncode == 2
    assert result.stderr.startswith("error: ") and "not a lapsewise model file" in result.stderr
    assert "Traceback" not in result.stderr
    assert not (tmp_path / "s.csv").exists()


POLICY = __import__("pathlib").Path(__file__).parent.parent / "policies" / "full-catalog.toml"


def test_stop_table_json_lists_every_state(demo_dir):
    result = run("stop-table", demo_dir / "model.json", "--policy", POLICY, "--horizon-quarters", 8, "--json")
    assert result.returncode == 0, result.stderr
    data = json.loads(result.stdout)
    # (0, 0) and every 1 <= x <= t_x <= 8, for each of the 3 spend bands.
    assert len(data["rows"]) == 3 * (1 + 8 * 9 // 2)
    row = data["rows"][0]
    assert set(row) >= {"frequency", "last_purchase_quarter", "stop_after", "spend_band"}
    assert data["economics"]["horizon_quarters"] == 8


HIGH_COST_SEASON = POLICY.parent / "high-cost-season.toml"


def test_stop_table_with_a_dear_quarter_and_versions_plans_on_the_calendar(demo_dir):
    # The demo's fitted seasons are within two standard errors of 1 (it is drawn without seasons), so the calendar
    # here is the policy's: quarter 4 dearer and thinner, three versions of the piece.
    result = run("stop-table", demo_dir / "model.json", "--policy", HIGH_COST_SEASON, "--horizon-quarters", 8, "--plug-in", "--json")
    assert result.returncode == 0, result.stderr
    data = json.loads(result.stdout)
    assert data["planned_with"] == "calendar"
    assert data["economics"]["quarters"] == {"quarter_4": {"gross_margin": 0.42, "order_cost": 5.5, "piece_cost": 1.6}}
    rows = data["rows"]
    assert len(rows) == 4 * 3 * (1 + 8 * 9 // 2)  # a row per quarter of the last order
    names = {"hold", "full", "slim", "postcard"}
    for row in rows:
        assert row["last_purchase_season"] in (1, 2, 3, 4) and len(row["actions"]) == 9 and set(row["actions"]) <= names
        pieces = [k for k, a in enumerate(row["actions"]) if a != "hold"]
        expected = (None if pieces[-1] == 8 else pieces[-1] + 1) if pieces else 0
        assert row["stop_after"] == expected
    assert any(a != "full" and a != "hold" for row in rows for a in row["actions"])  # some plan uses a cheaper version
    text = run("stop-table", demo_dir / "model.json", "--policy", HIGH_COST_SEASON, "--horizon-quarters", 8, "--plug-in")
    assert text.returncode == 0, text.stderr
    flat = " ".join(text.stdout.split())
    assert "Choices each quarter: hold or full, slim, postcard" in flat and "against one piece and every quarter alike" in flat
    assert "the policy's own quarters: Q4 gross_margin 0.42, order_cost 5.5, piece_cost 1.6" in flat


def test_calendar_stop_table_draws_only_when_asked_and_then_each_row_has_its_range(demo_dir):
    quiet = json.loads(run("stop-table", demo_dir / "model.json", "--policy", HIGH_COST_SEASON, "--horizon-quarters", 6, "--json").stdout)
    assert quiet["planned_with"] == "calendar" and quiet["draws"] == 0  # no draws by default on the calendar
    text = " ".join(run("stop-table", demo_dir / "model.json", "--policy", HIGH_COST_SEASON, "--horizon-quarters", 6).stdout.split())
    assert "no ranges over parameter draws by default when planning on the calendar" in text and "pass --draws 20 for them" in text
    drawn = json.loads(run("stop-table", demo_dir / "model.json", "--policy", HIGH_COST_SEASON, "--horizon-quarters", 6, "--draws", 3, "--json").stdout)
    assert drawn["draws"] == 3 and len(drawn["rows"]) == len(quiet["rows"])
    late = lambda v: 10**6 if v is None else v  # noqa: E731
    for row in drawn["rows"]:
        assert 0.0 <= row["agreement"] <= 1.0 and late(row["stop_after_low"]) <= late(row["stop_after_high"])


def test_a_bad_quarter_table_exits_2_naming_it(demo_dir, tmp_path):
    policy = tmp_path / "policy.toml"
    policy.write_text(HIGH_COST_SEASON.read_text().replace("[economics.quarter_4]        # the holiday quarter", "[economics.quarter_4]\nhorizon_quarters = 4"))
    result = run("stop-table", demo_dir / "model.json", "--policy", policy, "--plug-in")
    assert result.returncode == 2 and "Traceback" not in result.stderr
    assert "unknown key 'horizon_quarters' in [quarter_4]" in result.stderr and len(result.stderr.strip().splitlines()) == 1


def test_stop_table_ranges_over_draws_are_seeded_and_in_the_json(demo_dir):
    args = ("stop-table", demo_dir / "model.json", "--policy", POLICY, "--horizon-quarters", 6, "--draws", 6, "--seed", 4, "--json")
    first, again = run(*args), run(*args)
    assert first.returncode == 0, first.stderr
    assert first.stdout == again.stdout  # seeded: the same draws, the same bytes
    data = json.loads(first.stdout)
    assert data["draws"] == 6 and data["sensitivity"] is None
    for row in data["rows"]:
        assert {"stop_after_low", "stop_after_high", "agreement"} <= set(row)
        assert 0.0 <= row["agreement"] <= 1.0
        # the estimate's stop point lies in its range unless most draws disagree (None = mailed throughout, the latest)
        late = lambda v: 10**6 if v is None else v  # noqa: E731
        assert late(row["stop_after_low"]) <= late(row["stop_after_high"])
    plain = json.loads(run("stop-table", demo_dir / "model.json", "--policy", POLICY, "--horizon-quarters", 6, "--draws", 0, "--json").stdout)
    assert plain["draws"] == 0 and "agreement" not in plain["rows"][0]
    assert [r["stop_after"] for r in plain["rows"]] == [r["stop_after"] for r in data["rows"]]


def test_stop_table_sensitivity_counts_moved_stop_points_per_parameter(demo_dir):
    result = run("stop-table", demo_dir / "model.json", "--policy", POLICY, "--horizon-quarters", 4, "--draws", 0, "--sensitivity", "--json")
    assert result.returncode == 0, result.stderr
    data = json.loads(result.stdout)
    names = [row["parameter"] for row in data["sensitivity"]]
    assert names[:5] == ["alpha", "beta", "gamma", "delta", "rho"] and "spend p" in names
    assert all(0 <= row["moved_lower"] <= row["stop_points"] == len(data["rows"]) for row in data["sensitivity"])
    text = run("stop-table", demo_dir / "model.json", "--policy", POLICY, "--horizon-quarters", 4, "--draws", 0, "--sensitivity").stdout
    assert "two standard errors either way" in text and "The decisions hang most on" in text


def test_plan_reports_its_value_range_and_plug_in_leaves_it_out(demo_dir, tmp_path):
    common = ("plan", demo_dir / "model.json", demo_dir / "orders.csv", "--mailings", demo_dir / "mailings.csv", "--policy", POLICY,
              "--budget", 400, "--horizon-quarters", 6, "--json")
    drawn = json.loads(run(*common, "--draws", 8).stdout)
    assert drawn["draws"] == 8 and drawn["expected_profit_low"] <= drawn["expected_profit_high"]
    plug_in = json.loads(run(*common, "--draws", 8, "--plug-in").stdout)
    assert plug_in["draws"] == 0 and plug_in["expected_profit_low"] is None
    out = tmp_path / "list.csv"
    result = run("mail-list", *common[1:7], "--horizon-quarters", 6, "--plug-in", "--out", out)
    assert result.returncode == 0, result.stderr
    assert "value_low" not in pd.read_csv(out).columns


def test_stop_table_prints_optimal_beside_breakeven(demo_dir):
    result = run("stop-table", demo_dir / "model.json", "--policy", POLICY, "--horizon-quarters", 8, "--order-value", 50)
    assert result.returncode == 0, result.stderr
    assert "Breakeven rule" in result.stdout and "Stop mailing one-time buyers" in result.stdout


def test_override_with_an_impossible_value_is_refused(demo_dir):
    result = run("stop-table", demo_dir / "model.json", "--policy", POLICY, "--gross-margin", 1.5)
    assert result.returncode == 2 and "gross_margin" in result.stderr and "Traceback" not in result.stderr


def test_simulate_json(demo_dir):
    args = ("simulate", demo_dir / "model.json", "--policy", POLICY, "--horizon-quarters", 6, "--customers", 2000, "--seed", 4, "--json")
    first, second = run(*args), run(*args)
    assert first.returncode == 0, first.stderr
    assert first.stdout == second.stdout
    data = json.loads(first.stdout)
    names = [p["policy"] for p in data["policies"]]
    assert names[0] == "optimal" and "breakeven" in names and "always mail" in names and "stop after 12" in names


SEASON = POLICY.parent / "high-cost-season.toml"


def test_plan_json_has_its_keys_and_is_stable(demo_dir):
    args = ("plan", demo_dir / "model.json", demo_dir / "orders.csv", "--mailings", demo_dir / "mailings.csv", "--policy", POLICY, "--budget", 400, "--horizon-quarters", 8, "--json")
    first, second = run(*args), run(*args)
    assert first.returncode == 0, first.stderr
    assert first.stdout == second.stdout
    data = json.loads(first.stdout)
    for key in ("budget", "spent", "expected_profit", "shadow_price", "segments", "value_precision"):
        assert key in data
    assert data["spent"] <= 400
    precision = data["value_precision"]
    assert set(precision) == {"programs", "certified_share", "largest_bound", "refined", "draw_margins"} and not precision["refined"]
    assert 0 < precision["certified_share"] <= 1 and precision["programs"] >= 2
    segment = data["segments"][0]
    assert set(segment) == {"segment", "version", "customers", "mailed", "cost", "expected_orders", "expected_profit"}
    assert sum(s["customers"] for s in data["segments"]) == json.loads((demo_dir / "model.json").read_text())["customers"]


def test_certified_values_prove_every_value_and_say_so(demo_dir):
    # --certify-values refines the order values solved until every customer's value is proved within tolerance.
    common = ("plan", demo_dir / "model.json", demo_dir / "orders.csv", "--mailings", demo_dir / "mailings.csv", "--policy", POLICY,
              "--budget", 400, "--horizon-quarters", 8, "--plug-in")
    plain, certified = run(*common, "--json"), run(*common, "--json", "--certify-values")
    assert plain.returncode == 0 and certified.returncode == 0, certified.stderr
    before, after = json.loads(plain.stdout)["value_precision"], json.loads(certified.stdout)["value_precision"]
    assert after["refined"] and after["certified_share"] == 1.0 and after["programs"] > before["programs"]
    human = run(*common, "--certify-values")
    assert "every one proved within 1% (or 0.01)" in " ".join(human.stdout.split())


def test_plan_with_versions_and_frontier(demo_dir):
    result = run("plan", demo_dir / "model.json", demo_dir / "orders.csv", "--mailings", demo_dir / "mailings.csv", "--policy", SEASON, "--budget", 2500, "--horizon-quarters", 8, "--frontier")
    assert result.returncode == 0, result.stderr
    assert "shadow price" in result.stdout and "Budget against expected value" in result.stdout


def test_infeasible_plan_names_the_rule(demo_dir):
    result = run("plan", demo_dir / "model.json", demo_dir / "orders.csv", "--policy", SEASON, "--budget", 5, "--horizon-quarters", 8)
    assert result.returncode == 2
    assert "min_share" in result.stderr and "Traceback" not in result.stderr


def test_mail_list_writes_the_columns_in_order_and_honours_suppression(demo_dir, tmp_path):
    suppress = tmp_path / "suppress.csv"
    orders = (demo_dir / "orders.csv").read_text().splitlines()
    suppressed_ids = sorted({line.split(",")[0] for line in orders[1:40]})
    suppress.write_text("customer_id\n" + "\n".join(suppressed_ids) + "\n")
    out = tmp_path / "list.csv"
    result = run("mail-list", demo_dir / "model.json", demo_dir / "orders.csv", "--mailings", demo_dir / "mailings.csv", "--policy", POLICY, "--horizon-quarters", 8, "--suppress", suppress, "--out", out)
    assert result.returncode == 0, result.stderr

    rows = pd.read_csv(out)
    assert list(rows.columns) == ["customer_id", "segment", "version", "p_alive", "p_buy", "value_of_mailing", "value_low", "value_high", "may_flip", "decision", "rule"]
    assert set(rows.loc[rows.customer_id.isin(suppressed_ids), "decision"]) == {"suppressed"}
    # No budget: everyone worth mailing and not suppressed is mailed.
    assert (rows.loc[(rows.value_of_mailing > 0) & (rows.decision != "suppressed"), "decision"] == "mail").all()
    again = run("mail-list", demo_dir / "model.json", demo_dir / "orders.csv", "--policy", POLICY, "--out", out)
    assert again.returncode == 2 and "already exists" in again.stderr


def test_mail_list_segments_can_be_crossed_with_an_attribute(demo_dir, tmp_path):
    ids = pd.read_csv(demo_dir / "orders.csv").customer_id.unique()
    attributes = tmp_path / "attributes.csv"
    pd.DataFrame({"customer_id": ids, "region": ["north" if i % 2 else "south" for i in range(len(ids))]}).to_csv(attributes, index=False)
    out = tmp_path / "list.csv"
    result = run("mail-list", demo_dir / "model.json", demo_dir / "orders.csv", "--policy", POLICY, "--horizon-quarters", 6, "--attributes", attributes, "--segment-column", "region", "--budget", 300, "--out", out)
    assert result.returncode == 0, result.stderr
    rows = pd.read_csv(out, keep_default_na=False)
    assert rows.segment.str.endswith(", south").any() and rows.segment.str.endswith(", north").any()


def test_formula_like_cells_reach_the_mail_list_neutralised(demo_dir, tmp_path):
    # OWASP CSV-injection guidance: a cell starting with = + - @ is prefixed with a single quote. Customer ids and
    # version names start their cells in the mail list; each formula-like one must arrive quoted.
    ids = ["=1+1", "@SUM(A1)", "+7", "-HYPERLINK(x)", "plain"]
    orders = tmp_path / "orders.csv"
    orders.write_text("customer_id,order_date,amount\n" + "".join(f'"{i}",2024-01-15,40\n"{i}",2024-05-02,25\n' for i in ids))
    policy = tmp_path / "policy.toml"
    policy.write_text(POLICY.read_text().replace('name = "full"', 'name = "=WEBSERVICE(1)"'))
    out = tmp_path / "list.csv"
    result = run("mail-list", demo_dir / "model.json", orders, "--policy", policy, "--horizon-quarters", 4, "--as-of", "2024-06-30", "--out", out)
    assert result.returncode == 0, result.stderr
    rows = pd.read_csv(out, keep_default_na=False, dtype=str)
    assert sorted(rows.customer_id) == sorted("'" + i if i[0] in "=+-@" else i for i in ids)
    assert set(rows.version) == {"'=WEBSERVICE(1)"}


def test_every_command_says_when_there_is_no_mailings_file(demo_dir, tmp_path):
    orders = demo_dir / "orders.csv"
    model = tmp_path / "model.json"
    note = "counted as mailed"
    fitted = run("fit", orders, "--out", model)
    assert fitted.returncode == 0 and note in " ".join(fitted.stdout.split())
    commands = [
        ("summary", orders),
        ("backtest", orders, "--holdout-quarters", 2),
        ("score", model, orders, "--out", tmp_path / "scores.csv"),
        ("stop-table", model, "--policy", POLICY, "--horizon-quarters", 4),
        ("simulate", model, "--policy", POLICY, "--horizon-quarters", 4, "--customers", 500),
        ("plan", model, orders, "--policy", POLICY, "--horizon-quarters", 4, "--budget", 100),
        ("mail-list", model, orders, "--policy", POLICY, "--horizon-quarters", 4, "--out", tmp_path / "list.csv"),
    ]
    for command in commands:
        result = run(*command)
        assert result.returncode == 0, (command[0], result.stderr)
        assert note in " ".join(result.stdout.split()), command[0]  # rich wraps lines at 80 columns


# ---------------------------------------------------------------- order and piece timing

# A piece after the quarter's order (T1), before it (T2), on its day (T3); every first order is in January-March.
TIMED_ORDERS = orders_text("T1,2023-01-10,20", "T1,2023-05-10,30", "T2,2023-01-10,20", "T2,2023-05-10,30", "T3,2023-01-10,20", "T3,2023-05-10,30")
TIMED_MAILINGS = mailings_text("T1,2023-05-20", "T2,2023-05-01", "T3,2023-05-10")
TIMING_LINE = "purchase quarters whose only pieces arrived after the first order"


@pytest.mark.parametrize("in_home_days, changed", [(0, 1), (1, 2)])
def test_summary_counts_the_purchase_quarters_the_timing_changed(write_file, in_home_days, changed):
    orders, mailings = write_file("orders.csv", TIMED_ORDERS), write_file("mailings.csv", TIMED_MAILINGS)
    result = run_cli("summary", orders, "--mailings", mailings, "--as-of", "2023-06-30", "--in-home-days", in_home_days)
    assert (result.code, result.stderr) == (0, "")
    # By hand: T1's piece came ten days after its order; with one in-home day T3's piece, dated on the order's day, arrives after it too.
    [line] = [line for line in result.stdout.splitlines() if TIMING_LINE in line]
    assert line.split("│")[2].strip() == str(changed)


def test_fit_reads_mailings_with_the_in_home_days(demo_dir, tmp_path):
    orders, mailings = demo_dir / "orders.csv", demo_dir / "mailings.csv"
    rho = {}
    for days in (0, 30):
        assert run_cli("fit", orders, "--mailings", mailings, "--in-home-days", days, "--out", tmp_path / f"model-{days}.json").code == 0
        rho[days] = json.loads((tmp_path / f"model-{days}.json").read_text())["churn"]["rho"]
    # The demo's true rho is 0.3 (demo/truth.json); on this small base its standard error is about 0.036, so 0.1 is
    # nearly three errors. Its pieces are dated in the first 20 days of their quarter: with 30 in-home days none
    # arrives by a quarter's order, every repeat purchase falls in an unmailed quarter, and rho runs to its bound, 1.
    assert abs(rho[0] - 0.3) < 0.1
    assert rho[30] > 0.9


@pytest.mark.parametrize("command", ["summary", "fit", "score", "backtest", "plan", "mail-list", "report"])
def test_negative_in_home_days_exit_2_with_one_line(write_file, tmp_path, command):
    orders = write_file("orders.csv", GOOD_ORDERS)
    model, policy = tmp_path / "model.json", str(POLICY)
    arguments = {
        "summary": [orders],
        "fit": [orders, "--out", tmp_path / "m.json"],
        "score": [model, orders, "--out", tmp_path / "s.csv"],
        "backtest": [orders, "--holdout-quarters", 1],
        "plan": [model, orders, "--policy", policy, "--budget", 10],
        "mail-list": [model, orders, "--policy", policy, "--out", tmp_path / "l.csv"],
        "report": [model, orders, "--policy", policy, "--out", tmp_path / "r.html"],
    }[command]
    assert_one_error_line(run_cli(command, *arguments, "--in-home-days", -1), "--in-home-days")


# ---------------------------------------------------------------- bad input through the command line


def test_clean_file_summary_succeeds(write_file):
    result = run_cli("summary", write_file("orders.csv", GOOD_ORDERS))
    # GOOD_ORDERS has two customers, A1 and B2, both starting in January-March 2023.
    assert (result.code, result.stderr) == (0, "")
    assert "2 customers" in result.stdout


def test_bad_input_exits_2_with_one_line(bad_input, tmp_path):
    """Each fatal case (see conftest.BAD_INPUTS): exit 2, one 'error:' line naming the file, row or column."""
    orders, mailings = bad_input.make(tmp_path)
    assert_one_error_line(run_cli(*bad_input.cli_args(orders, mailings)), *bad_input.expected(orders, mailings))


@pytest.mark.parametrize("case", ["missing-file", "non-numeric-amount", "binary-garbage"])
def test_bad_input_in_a_real_process_prints_no_traceback(tmp_path, case):
    """The installed entry point, run as its own process, behaves as the in-process runs above."""
    bad = next(b for b in BAD_INPUTS if b.id == case)
    orders, mailings = bad.make(tmp_path)
    assert_one_error_line(run_cli_process(*bad.cli_args(orders, mailings)), *bad.expected(orders, mailings))


@pytest.mark.parametrize(
    "old, new, option",
    [("customer_id", "client", "--id-column"), ("order_date", "date", "--date-column"), ("amount", "value", "--amount-column")],
)
def test_column_options_fix_a_misnamed_column(write_file, old, new, option):
    path = write_file("orders.csv", GOOD_ORDERS.replace(old, new, 1))
    # Without the option the column is missing (exit 2); with it the file reads as GOOD_ORDERS does.
    assert_one_error_line(run_cli("summary", path), str(path), f"'{old}'", option)
    result = run_cli("summary", path, option, new)
    assert result.code == 0, result.stderr
    assert "2 customers" in result.stdout


def test_id_column_option_renames_the_mailings_id_too(write_file):
    orders = write_file("orders.csv", GOOD_ORDERS.replace("customer_id", "client", 1))
    mailings = write_file("mailings.csv", "client,mail_date\nA1,2023-04-10\n")
    result = run_cli("summary", orders, "--mailings", mailings, "--id-column", "client")
    assert result.code == 0, result.stderr


def test_line_break_inside_a_quoted_cell_stays_on_one_line(write_file):
    path = write_file("orders.csv", orders_text("A1,2023-01-15,10", 'B2,2023-02-01,"12\n50"'))
    # The quoted amount holds a line break; the message shows it escaped as \n.
    line = assert_one_error_line(run_cli("summary", path), str(path), "row 3", "column amount")
    assert "'12\\n50'" in line


def test_orders_in_one_incomplete_quarter_name_the_file(write_file):
    path = write_file("orders.csv", orders_text("A1,2023-01-15,10", "B2,2023-02-01,5"))
    # Both orders fall in January-March 2023, which the last order (2023-02-01) does not complete.
    assert_one_error_line(run_cli("summary", path), str(path), "--as-of 2023-03-31")
    assert run_cli("summary", path, "--as-of", "2023-03-31").code == 0


@pytest.mark.parametrize(
    "options, fragments",
    [
        (["--fiscal-year-start", "13"], ["--fiscal-year-start", "13 is not a month"]),
        # Past the last year datetime64[ns] holds; the panel would otherwise fail on an impossible date.
        (["--as-of", "9999-12-31"], ["--as-of 9999-12-31"]),
        # A date with a time is not a YYYY-MM-DD date.
        (["--as-of", "2023-06-30T12:00"], ["--as-of", "YYYY-MM-DD"]),
    ],
    ids=["fiscal-year-start", "as-of-far-ahead", "as-of-with-time"],
)
def test_bad_options_exit_2_with_one_line(write_file, options, fragments):
    assert_one_error_line(run_cli("summary", write_file("orders.csv", GOOD_ORDERS), *options), *fragments)


@ANY_FILE_SETTINGS
@given(content=ANY_FILE)
def test_summary_command_succeeds_or_exits_2_on_any_file(content):
    """Whatever the bytes: exit 0, or exit 2 with one 'error:' line naming the file; never a traceback."""
    with file_holding(content) as path:
        result = run_cli("summary", path)
    if result.code == 0:
        assert "customers" in result.stdout
        assert result.stderr == ""
    else:
        assert_one_error_line(result, str(path))


# ---------------------------------------------------------------- hostile and careless command lines


@pytest.fixture(scope="module")
def hostile(demo_dir, tmp_path_factory):
    """Files for the hostile command lines: a model fitted without mailings, lists, a pipe, a file in the way."""
    import os

    folder = tmp_path_factory.mktemp("hostile")
    assert run("fit", demo_dir / "orders.csv", "--out", folder / "no-mailings.json").returncode == 0
    (folder / "strangers.csv").write_text("customer_id\n1\n2\n3\n")
    ids = pd.read_csv(demo_dir / "orders.csv").customer_id.unique()
    pd.DataFrame({"customer_id": ids}).to_csv(folder / "everyone.csv", index=False)
    os.mkfifo(folder / "pipe.csv")
    (folder / "a-file").write_text("x")
    return folder


HOSTILE = [
    ("budget-infinite", ["plan", "{model}", "{orders}", "--policy", "{policy}", "--budget", "inf"], ["--budget"]),
    ("budget-nan", ["plan", "{model}", "{orders}", "--policy", "{policy}", "--budget", "nan"], ["--budget"]),
    ("budget-negative", ["plan", "{model}", "{orders}", "--policy", "{policy}", "--budget", "-5"], ["--budget"]),
    ("seed-negative", ["simulate", "{model}", "--policy", "{policy}", "--seed", "-1"], ["--seed"]),
    ("customers-huge", ["simulate", "{model}", "--policy", "{policy}", "--customers", "50000000"], ["--customers"]),
    ("out-in-missing-folder", ["mail-list", "{model}", "{orders}", "--policy", "{policy}", "--out", "{hostile}/nowhere/list.csv"], ["does not exist"]),
    ("out-through-a-file", ["mail-list", "{model}", "{orders}", "--policy", "{policy}", "--out", "{hostile}/a-file/list.csv"], ["is a file, not a folder"]),
    ("orders-a-pipe", ["summary", "{hostile}/pipe.csv"], ["not a regular file"]),
    ("dert-infinite", ["score", "{model}", "{orders}", "--annual-discount-rate", "0", "--out", "{hostile}/scores.csv"], ["DERT is infinite"]),
    ("suppression-matches-nobody", ["plan", "{model}", "{orders}", "--policy", "{policy}", "--budget", "100", "--suppress", "{hostile}/strangers.csv"], ["none of its 3 ids"]),
    ("held-never-orders-but-did", ["plan", "{hostile}/no-mailings.json", "{orders}", "--mailings", "{mailings}", "--policy", "{policy}", "--budget", "100"],
     ["fitted without a mailings file", "ordered in quarters", "--mailings"]),
    ("horizon-beyond-the-maximum", ["stop-table", "{model}", "--policy", "{policy}", "--horizon-quarters", "120"], ["horizon_quarters = 120 is above 80"]),
]


@pytest.mark.parametrize("case", HOSTILE, ids=[case[0] for case in HOSTILE])
def test_hostile_command_lines_exit_2_with_one_line_and_write_nothing(demo_dir, hostile, case):
    _, template, fragments = case
    names = {"model": demo_dir / "model.json", "orders": demo_dir / "orders.csv", "mailings": demo_dir / "mailings.csv",
             "policy": demo_dir / "policy.toml", "hostile": hostile}
    before = set(hostile.iterdir())
    result = run_cli(*[part.format(**names) for part in template])
    assert_one_error_line(result, *fragments)
    assert set(hostile.iterdir()) == before


def test_everyone_suppressed_gives_an_empty_plan_and_a_list_of_suppressed(demo_dir, hostile, tmp_path):
    out = tmp_path / "list.csv"
    args = ("--policy", demo_dir / "policy.toml", "--horizon-quarters", 4, "--suppress", hostile / "everyone.csv")
    result = run_cli("mail-list", demo_dir / "model.json", demo_dir / "orders.csv", *args, "--out", out)
    assert result.code == 0, result.stderr
    assert set(pd.read_csv(out).decision) == {"suppressed"}
    assert "3,000 of its 3,000 ids are customers here" in " ".join(result.stdout.split())
    plan = json.loads(run_cli("plan", demo_dir / "model.json", demo_dir / "orders.csv", *args, "--budget", 100, "--json").stdout)
    assert plan["spent"] == 0 and plan["suppression"] == {"file": str(hostile / "everyone.csv"), "ids_listed": 3000, "ids_matched": 3000}


def test_absurd_but_allowed_models_and_policies_give_finite_outputs_or_one_line(demo_dir, tmp_path):
    # Parameters at the edges of what a model file may hold, a policy at the edges of what it may say:
    # every output is finite, or the command refuses in one line; never NaN or infinity with exit 0.
    model = json.loads((demo_dir / "model.json").read_text())
    policy = (demo_dir / "policy.toml").read_text()
    policy = policy.replace("annual_discount_rate = 0.10", "annual_discount_rate = 0").replace("horizon_quarters = 40", "horizon_quarters = 3")
    policy = policy.replace("order_cost = 4.00", "order_cost = 0").replace("gross_margin = 0.45", "gross_margin = 1.0")
    (tmp_path / "edge.toml").write_text(policy)
    edges = [dict(alpha=1e-4, beta=1e5, gamma=1e5, delta=1e-4), dict(alpha=1e5, beta=1e-4, gamma=1e-4, delta=1e5), dict(alpha=1e-4, beta=1e-4, gamma=1e-4, delta=1e-4)]
    for index, churn in enumerate(edges):
        path = tmp_path / f"edge{index}.json"
        path.write_text(json.dumps({**model, "churn": {**model["churn"], **churn, "rho": 1e-6}}))
        common = (demo_dir / "orders.csv", "--mailings", demo_dir / "mailings.csv")
        outputs = [
            ("score", [path, *common, "--out", tmp_path / f"scores{index}.csv"], tmp_path / f"scores{index}.csv"),
            ("stop-table", [path, "--policy", tmp_path / "edge.toml", "--json"], None),
            ("simulate", [path, "--policy", tmp_path / "edge.toml", "--customers", 300, "--json"], None),
            ("plan", [path, *common, "--policy", tmp_path / "edge.toml", "--budget", 50, "--json"], None),
            ("mail-list", [path, *common, "--policy", tmp_path / "edge.toml", "--out", tmp_path / f"list{index}.csv"], tmp_path / f"list{index}.csv"),
        ]
        for command, args, written in outputs:
            result = run_cli(command, *args)
            if result.code != 0:
                assert_one_error_line(result)
                continue
            text = written.read_text() if written is not None else result.stdout
            assert not any(token in text.lower() for token in ("nan", "inf")), (command, index)


# ---------------------------------------------------------------- files as order and donor systems export them

# Invented donor exports: the same three gifts (and two mailings) as a US system and a German one would write them.
DONOR_US = "Donor ID,Gift Date,Gift Amount\nD1,10/18/2022,$104.00\nD2,11/23/2022,\"$1,250.00\"\nD1,02/14/2023,($4.00)\nD2,03/20/2023,$25.50\n"
DONOR_DE = "Donor ID;Gift Date;Gift Amount\nD1;18.10.2022;104,00 \u20ac\nD2;23.11.2022;1.250,00 \u20ac\nD1;14.02.2023;-4,00 \u20ac\nD2;20.03.2023;25,50 \u20ac\n"
DONOR_CLEAN = "Donor ID,Gift Date,Gift Amount\nD1,2022-10-18,104.00\nD2,2022-11-23,1250.00\nD1,2023-02-14,-4.00\nD2,2023-03-20,25.50\n"
DONOR_OPTIONS = ["--id-column", "Donor ID", "--date-column", "Gift Date", "--amount-column", "Gift Amount", "--as-of", "2023-03-31"]


def test_fit_reads_donor_exports_with_the_options_and_writes_the_clean_files_model(tmp_path):
    """The same gifts as US and German exports give the model file the clean CSV gives, byte for byte."""
    written = {}
    for label, text, extra in (("clean", DONOR_CLEAN, []), ("us", DONOR_US, []), ("de", DONOR_DE, ["--decimal-comma", "--date-format", "%d.%m.%Y"])):
        orders = tmp_path / f"{label}.csv"
        orders.write_text(text, encoding="cp1252" if label == "de" else "utf-8")
        out = tmp_path / f"{label}.json"
        encoding = ["--encoding", "cp1252"] if label == "de" else []
        result = run_cli("fit", orders, "--out", out, *DONOR_OPTIONS, *extra, *encoding)
        assert result.code == 0, result
        written[label] = out.read_text()
    assert written["us"] == written["clean"]
    assert written["de"] == written["clean"]


@pytest.mark.parametrize(
    "text, fragments",
    [
        # Every day is 12 or less, so 01/02/2023 is 1 February or 2 January: the option must say which.
        ("customer_id,order_date,amount\nA1,01/02/2023,10\nB2,03/04/2023,5\n", ("column order_date", "day-first and month-first", "--date-format")),
        # 1,250 is 1250 or 1.25; no amount in the column shows the decimal mark.
        ('customer_id,order_date,amount\nA1,2023-01-15,"1,250"\nB2,2023-02-01,"2,500"\n', ("column amount", "'1,250'", "--decimal-comma", "--decimal-point")),
    ],
)
def test_ambiguous_files_are_refused_and_nothing_is_written(tmp_path, text, fragments):
    orders = tmp_path / "orders.csv"
    orders.write_text(text)
    out = tmp_path / "model.json"
    assert_one_error_line(run_cli("fit", orders, "--out", out, "--as-of", "2023-06-30"), str(orders), *fragments)
    assert not out.exists()
    assert list(tmp_path.iterdir()) == [orders]  # no partial or temporary file either


# ---------------------------------------------------------------- how mailing was decided (issue 13, item 3)


def scenario_files(folder, lapse_after, winback_share, seed=5, customers=3_000):
    """Orders and mailings of the demo scenario drawn with the given mailing rule: mailed while silent for fewer
    than ``lapse_after`` quarters, and a random ``winback_share`` of the rest (lapse_after 0: everyone at random)."""
    from lapsewise.evaluate.scenario import Truth, simulate_base

    data = simulate_base(customers, 16, seed, Truth(lapse_after=lapse_after, winback_share=winback_share))
    folder.mkdir(exist_ok=True)
    data.orders.to_csv(folder / "orders.csv", index=False)
    data.mailings.to_csv(folder / "mailings.csv", index=False)
    return folder / "orders.csv", folder / "mailings.csv"


@pytest.fixture(scope="module")
def every_quarter_mailed(tmp_path_factory):
    """A model fitted on a mailings file that mails every customer in every quarter (the rule never lapses anyone)."""
    folder = tmp_path_factory.mktemp("all-mailed")
    orders, mailings = scenario_files(folder, lapse_after=100, winback_share=0.0)
    result = run("fit", orders, "--mailings", mailings, "--out", folder / "model.json")
    return folder, orders, mailings, result


def test_fit_json_reports_mailing_at_random_as_not_following_rules(tmp_path):
    # Every customer mailed at random at 70%, whatever their history: the check finds no rule and adds no warning.
    orders, mailings = scenario_files(tmp_path / "random", lapse_after=0, winback_share=0.7)
    result = run("fit", orders, "--mailings", mailings, "--out", tmp_path / "model.json", "--json")
    assert result.returncode == 0, result.stderr
    data = json.loads(result.stdout)
    check = data["mailing_check"]
    assert list(check) == sorted(check)  # stable: sorted keys
    assert check["followed_rules"] is False
    assert abs(check["unmailed_share"] - 0.30) < 0.02
    assert check["explained_share"] < 0.02
    assert not any("control cell" in warning for warning in data["warnings"])
    assert json.loads((tmp_path / "model.json").read_text())["mailing_check"] == check


def test_fit_warns_when_mailing_followed_recency(tmp_path):
    # Mailed while silent for 3 quarters or fewer, 5% of the rest at random: the check names recency, and fit warns.
    orders, mailings = scenario_files(tmp_path / "targeted", lapse_after=4, winback_share=0.05)
    result = run("fit", orders, "--mailings", mailings, "--out", tmp_path / "model.json", "--json")
    assert result.returncode == 0, result.stderr
    data = json.loads(result.stdout)
    assert data["mailing_check"]["followed_rules"] is True
    assert data["mailing_check"]["strongest_predictor"] == "recency"
    warning = [w for w in data["warnings"] if "control cell" in w]
    assert len(warning) == 1 and "rather than chance" in warning[0] and "lapsewise control-cell" in warning[0]
    shown = run("fit", orders, "--mailings", mailings, "--out", tmp_path / "model.json", "--force")
    text = " ".join(shown.stdout.split())  # rich wraps lines at 80 columns
    assert "How was mailing decided?" in text and "Mailing followed the firm's own rules" in text and "recency explains most" in text


def test_fit_says_rho_cannot_be_estimated_when_every_quarter_was_mailed(every_quarter_mailed):
    folder, _, _, result = every_quarter_mailed
    assert result.returncode == 0, result.stderr
    text = " ".join(result.stdout.split())
    assert "rho cannot be estimated" in text and "not identified" not in text
    model = json.loads((folder / "model.json").read_text())
    assert model["churn"]["rho"] is None and model["rho_estimable"] is False and model["mailing_history"] is True
    assert model["mailing_check"]["unmailed_quarters"] == 0 and model["mailing_check"]["customer_quarters"] > 0


@pytest.mark.parametrize("command", ["stop-table", "plan", "simulate", "mail-list"])
def test_deciding_without_rho_needs_unmailed_response(every_quarter_mailed, tmp_path, command):
    folder, orders, mailings, _ = every_quarter_mailed
    model = folder / "model.json"
    files = {
        "stop-table": (model,),
        "simulate": (model, "--customers", 500),
        "plan": (model, orders, "--mailings", mailings, "--budget", 200),
        "mail-list": (model, orders, "--mailings", mailings, "--out", tmp_path / "list.csv"),
    }[command]
    refused = run(command, *files, "--policy", POLICY, "--horizon-quarters", 4)
    assert refused.returncode == 2 and "Traceback" not in refused.stderr
    assert refused.stderr.count("\n") == 1 and refused.stderr.startswith("error:")
    assert f"{POLICY}: unmailed_response is required" in refused.stderr and "could not be estimated" in refused.stderr
    assert not (tmp_path / "list.csv").exists()
    # The policy file's key, or the override, lets it run.
    policy = tmp_path / "policy.toml"
    policy.write_text(POLICY.read_text().replace("# unmailed_response = 0.2", "unmailed_response = 0.2"))
    for runs in (run(command, *files, "--policy", policy, "--horizon-quarters", 4, "--force" if command == "mail-list" else "--json"),
                 run(command, *files, "--policy", POLICY, "--horizon-quarters", 4, "--unmailed-response", 0.2, *(["--force"] if command == "mail-list" else []))):
        assert runs.returncode == 0, runs.stderr


def test_without_a_mailings_file_deciding_still_takes_rho_zero(demo_dir, tmp_path):
    # Regression: no mailings file means every quarter counts as mailed, and a held customer is taken never to order
    # (rho 0, README); the check is not run and nothing is required of the policy.
    model = tmp_path / "model.json"
    fitted = run("fit", demo_dir / "orders.csv", "--out", model, "--json")
    assert fitted.returncode == 0, fitted.stderr
    data = json.loads(fitted.stdout)
    assert data["churn"]["rho"] is None and data["mailing_check"] is None and data["rho_estimable"] is True
    assert data["mailing_history"] is False
    table = run("stop-table", model, "--policy", POLICY, "--horizon-quarters", 4, "--json")
    assert table.returncode == 0, table.stderr
    assert json.loads(table.stdout)["unmailed_response_used"] == 0.0


# ---------------------------------------------------------------- the control cell

CONTROL_KEYS = ["customers_in_cell", "eligible", "expected_value_forgone", "precision", "seed"]


def control_cell_args(demo_dir, out, *extra):
    return ("control-cell", demo_dir / "model.json", demo_dir / "orders.csv", "--policy", POLICY, "--mailings", demo_dir / "mailings.csv",
            "--horizon-quarters", 8, "--as-of", "2023-09-30", "--precision", 0.2, "--out", out, *extra)


def test_control_cell_json_keys_force_and_the_same_seed(demo_dir, tmp_path):
    out = tmp_path / "cell.csv"
    first = run_cli(*control_cell_args(demo_dir, out, "--json", "--seed", 5))
    assert first.code == 0, first.stderr
    data = json.loads(first.stdout)
    assert list(data) == CONTROL_KEYS  # exactly these keys, sorted
    assert data["seed"] == 5 and 0 < data["customers_in_cell"] <= data["eligible"] / 2 and data["precision"] <= 0.2
    rows = pd.read_csv(out)
    assert list(rows.columns) == ["customer_id", "segment"] and len(rows) == data["customers_in_cell"]
    written = out.read_bytes()
    again = run_cli(*control_cell_args(demo_dir, out, "--json", "--seed", 5))
    assert_one_error_line(again, "already exists", "--force")
    forced = run_cli(*control_cell_args(demo_dir, out, "--json", "--seed", 5, "--force"))
    assert forced.code == 0 and forced.stdout == first.stdout and out.read_bytes() == written
    other = run_cli(*control_cell_args(demo_dir, out, "--seed", 6, "--force"))
    assert other.code == 0 and out.read_bytes() != written
    assert "Expected value forgone" in other.stdout and "data-protection law" in other.stdout


@pytest.mark.parametrize("precision", ["0", "1", "-0.1", "1.5", "nan"])
def test_control_cell_refuses_a_precision_outside_0_to_1(demo_dir, tmp_path, precision):
    out = tmp_path / "cell.csv"
    args = list(control_cell_args(demo_dir, out))
    args[args.index("--precision") + 1] = precision
    assert_one_error_line(run_cli(*args), "--precision", "above 0 and below 1")
    assert not out.exists()


def test_control_cell_refuses_a_precision_the_base_cannot_reach_saying_the_best(demo_dir, tmp_path):
    out = tmp_path / "cell.csv"
    args = list(control_cell_args(demo_dir, out))
    args[args.index("--precision") + 1] = "0.01"
    assert_one_error_line(run_cli(*args), "--precision 0.01", "holding half", "only to within +-")
    assert not out.exists()


def test_fit_reads_a_control_cell_held_in_its_as_of_quarter(demo_dir, tmp_path):
    cell = tmp_path / "cell.csv"
    assert run_cli(*control_cell_args(demo_dir, cell)).code == 0
    # The demo mailed by its own rule; take the quarter's pieces away from the cell but its first 3 customers
    # (3 list errors), so the cell is held there.
    held = pd.read_csv(cell).customer_id
    mailings = pd.read_csv(demo_dir / "mailings.csv")
    in_quarter = mailings.mail_date >= "2023-10-01"
    mailed_anyway = held.iloc[:3][held.iloc[:3].isin(mailings.customer_id[in_quarter])]
    edited = tmp_path / "mailings.csv"
    mailings[~(in_quarter & mailings.customer_id.isin(held.iloc[3:]))].to_csv(edited, index=False)
    result = run_cli("fit", demo_dir / "orders.csv", "--mailings", edited, "--control", cell, "--out", tmp_path / "m.json", "--json")
    assert result.code == 0, result.stderr
    control = json.loads(result.stdout)["control"]
    assert list(control) == ["customers", "disagree", "rho_cell", "rho_cell_se", "rho_model", "rho_model_se"]
    assert control["customers"] <= len(held) - len(mailed_anyway)
    assert control["rho_cell"] >= 0 and control["rho_cell_se"] > 0
    assert control["rho_model"] == pytest.approx(json.loads((tmp_path / "m.json").read_text())["churn"]["rho"], abs=1e-6)  # JSON keeps 6 decimals
    shown = run_cli("fit", demo_dir / "orders.csv", "--mailings", edited, "--control", cell, "--out", tmp_path / "m.json", "--force")
    assert "rho from the control cell" in shown.stdout
    assert (f"{len(mailed_anyway):,} of the cell's {len(held):,} customers were mailed anyway" in shown.stdout) == (len(mailed_anyway) > 0)


def test_fit_refuses_a_control_cell_that_matches_nobody_and_writes_no_model(demo_dir, tmp_path):
    cell = tmp_path / "cell.csv"
    cell.write_text("customer_id,segment\nNOBODY1,\"0 repeat, 1 silent\"\nNOBODY2,\"1 repeat, 0 silent\"\n")
    out = tmp_path / "m.json"
    result = run_cli("fit", demo_dir / "orders.csv", "--mailings", demo_dir / "mailings.csv", "--control", cell, "--out", out)
    assert_one_error_line(result, "cell.csv", "none of its 2 ids is a customer")
    assert not out.exists()

"""The commands end to end on a small demo scenario, run as a user would run them."""

import json
import subprocess
import sys

import pytest


def run(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "lapsewise", *map(str, args)], capture_output=True, text=True, cwd=cwd)


@pytest.fixture(scope="module")
def demo_dir(tmp_path_factory):
    folder = tmp_path_factory.mktemp("demo")
    result = run("demo", "--dir", folder, "--customers", 3000, "--quarters", 16, "--seed", 3)
    assert result.returncode == 0, result.stderr
    return folder


def test_demo_writes_its_files_and_prints_every_step(demo_dir):
    for name in ("orders.csv", "mailings.csv", "truth.json", "model.json"):
        assert (demo_dir / name).exists()
    result = run("demo", "--dir", demo_dir, "--customers", 3000, "--quarters", 16, "--seed", 3)
    # Never overwrite without --force.
    assert result.returncode == 2 and "--force" in result.stderr and "Traceback" not in result.stderr


def test_demo_output_sections(tmp_path):
    result = run("demo", "--dir", tmp_path / "d", "--customers", 1500, "--quarters", 12)
    assert result.returncode == 0, result.stderr
    for text in ("customers", "Hidden-churn model", "true settings", "Backtest", "personal data"):
        assert text in result.stdout


def test_demo_is_deterministic(tmp_path):
    run("demo", "--dir", tmp_path / "a", "--customers", 800, "--quarters", 10, "--seed", 11)
    run("demo", "--dir", tmp_path / "b", "--customers", 800, "--quarters", 10, "--seed", 11)
    for name in ("orders.csv", "mailings.csv", "model.json"):
        assert (tmp_path / "a" / name).read_bytes() == (tmp_path / "b" / name).read_bytes()


def test_fit_writes_model_and_refuses_to_overwrite(demo_dir, tmp_path):
    out = tmp_path / "model.json"
    result = run("fit", demo_dir / "orders.csv", "--mailings", demo_dir / "mailings.csv", "--out", out)
    assert result.returncode == 0, result.stderr
    model = json.loads(out.read_text())
    assert model["mailing_history"] is True and model["churn"]["rho"] is not None
    assert "Return curve" in result.stdout
    again = run("fit", demo_dir / "orders.csv", "--out", out)
    assert again.returncode == 2 and "already exists" in again.stderr
    forced = run("fit", demo_dir / "orders.csv", "--out", out, "--force")
    assert forced.returncode == 0
    # Without a mailings file rho is not estimated and the output says every quarter counts as mailed.
    assert json.loads(out.read_text())["churn"]["rho"] is None
    assert "counted as mailed" in forced.stdout


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
    assert lines[0] == "customer_id,x,t_x,n,silent_quarters,p_alive,p_buy,expected_purchases,dert,expected_order_value"
    model = json.loads((demo_dir / "model.json").read_text())
    assert len(lines) - 1 == model["customers"]


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


def test_stop_table_prints_optimal_beside_breakeven(demo_dir):
    result = run("stop-table", demo_dir / "model.json", "--policy", POLICY, "--horizon-quarters", 8, "--order-value", 50)
    assert result.returncode == 0, result.stderr
    assert "Breakeven rule" in result.stdout and "Drop one-time buyers" in result.stdout


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
    assert names[0] == "optimal" and "breakeven" in names and "always mail" in names and "drop after 12" in names


SEASON = POLICY.parent / "high-cost-season.toml"


def test_plan_json_has_its_keys_and_is_stable(demo_dir):
    args = ("plan", demo_dir / "model.json", demo_dir / "orders.csv", "--mailings", demo_dir / "mailings.csv", "--policy", POLICY, "--budget", 400, "--horizon-quarters", 8, "--json")
    first, second = run(*args), run(*args)
    assert first.returncode == 0, first.stderr
    assert first.stdout == second.stdout
    data = json.loads(first.stdout)
    for key in ("budget", "spent", "expected_profit", "shadow_price", "segments"):
        assert key in data
    assert data["spent"] <= 400
    segment = data["segments"][0]
    assert set(segment) == {"segment", "version", "customers", "mailed", "cost", "expected_orders", "expected_profit"}
    assert sum(s["customers"] for s in data["segments"]) == json.loads((demo_dir / "model.json").read_text())["customers"]


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
    import pandas as pd

    rows = pd.read_csv(out)
    assert list(rows.columns) == ["customer_id", "segment", "version", "p_alive", "p_buy", "value_of_mailing", "decision"]
    assert set(rows.loc[rows.customer_id.isin(suppressed_ids), "decision"]) == {"suppressed"}
    # No budget: everyone worth mailing and not suppressed is mailed.
    assert (rows.loc[(rows.value_of_mailing > 0) & (rows.decision != "suppressed"), "decision"] == "mail").all()
    again = run("mail-list", demo_dir / "model.json", demo_dir / "orders.csv", "--policy", POLICY, "--out", out)
    assert again.returncode == 2 and "already exists" in again.stderr


def test_mail_list_segments_can_be_crossed_with_an_attribute(demo_dir, tmp_path):
    import pandas as pd

    ids = pd.read_csv(demo_dir / "orders.csv").customer_id.unique()
    attributes = tmp_path / "attributes.csv"
    pd.DataFrame({"customer_id": ids, "region": ["=north" if i % 2 else "south" for i in range(len(ids))]}).to_csv(attributes, index=False)
    out = tmp_path / "list.csv"
    result = run("mail-list", demo_dir / "model.json", demo_dir / "orders.csv", "--policy", POLICY, "--horizon-quarters", 6, "--attributes", attributes, "--segment-column", "region", "--budget", 300, "--out", out)
    assert result.returncode == 0, result.stderr
    rows = pd.read_csv(out, keep_default_na=False)
    assert rows.segment.str.endswith(", south").any()
    # A formula-like attribute is neutralised in the written file (OWASP CSV-injection guidance).
    assert rows.segment.str.startswith("'").any() or rows.segment.str.contains(", =north").any()
    assert not rows.segment.str.startswith("=").any()


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


def test_demo_runs_on_the_shortest_history_it_accepts(tmp_path):
    # Four quarters leave room for a one-quarter backtest; every step must still run.
    result = run("demo", "--dir", tmp_path / "d", "--customers", 100, "--quarters", 4)
    assert result.returncode == 0, result.stderr
    assert "last 1 quarters held out" in result.stdout

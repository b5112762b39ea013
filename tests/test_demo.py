"""The demo: its files, its sections, determinism, the shortest history, and its policy kept equal to the example file."""

from pathlib import Path

from builders import run


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
    assert "at each customer's own order value" in " ".join(result.stdout.split())


def test_demo_is_deterministic(tmp_path):
    run("demo", "--dir", tmp_path / "a", "--customers", 800, "--quarters", 10, "--seed", 11)
    run("demo", "--dir", tmp_path / "b", "--customers", 800, "--quarters", 10, "--seed", 11)
    for name in ("orders.csv", "mailings.csv", "model.json"):
        assert (tmp_path / "a" / name).read_bytes() == (tmp_path / "b" / name).read_bytes()


def test_demo_runs_on_the_shortest_history_it_accepts(tmp_path):
    # Four quarters leave room for a one-quarter backtest; every step must still run.
    result = run("demo", "--dir", tmp_path / "d", "--customers", 100, "--quarters", 4)
    assert result.returncode == 0, result.stderr
    assert "last 1 quarters held out" in result.stdout


def test_the_demo_policy_is_the_full_catalog_example_file():
    # The demo runs on policies/full-catalog.toml, shipped inside the package as demo-policy.toml.
    from lapsewise.app.demo import demo_policy_text

    assert demo_policy_text() == (Path(__file__).parent.parent / "policies" / "full-catalog.toml").read_text(encoding="utf-8")

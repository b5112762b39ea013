"""The demo scenario's data: the documented true settings match the generator."""

import json


def test_demo_truth_file_matches_the_generator():
    # demo/truth.json documents the generator's defaults; they must not drift apart.
    from pathlib import Path

    from lapsewise.evaluate.scenario import Truth

    recorded = json.loads((Path(__file__).parent.parent / "demo" / "truth.json").read_text())
    for key, value in Truth().as_dict().items():
        assert recorded[key] == value, key


def test_the_truth_comparison_flags_estimates_beyond_two_errors():
    from lapsewise.evaluate.scenario import Truth, compare_with_truth
    from lapsewise.model.churn import ChurnFit
    from lapsewise.model.fitted import Model

    truth = Truth()
    errors = {"alpha": 0.05, "beta": 0.1, "gamma": 0.05, "delta": 0.2, "rho": 0.01}
    # alpha 3 errors away, beta 1.5 away, the rest exact.
    churn = ChurnFit(alpha=truth.alpha + 0.15, beta=truth.beta - 0.15, gamma=truth.gamma, delta=truth.delta, rho=truth.rho, std_errors=errors)
    table = compare_with_truth(Model(churn, None, "2025-12-31", 0, 1, 1), truth).set_index("parameter")
    assert table.within_two_errors.to_dict() == {"alpha": False, "beta": True, "gamma": True, "delta": True, "rho": True}

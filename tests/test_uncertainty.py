"""Parameter uncertainty: the fits' covariance, the draws, and the decisions that average over them.

Outside checks: the delta method (Var g(X) ~ g'(mu)^2 Var X; Casella & Berger,
Statistical Inference, 2nd ed., section 5.5.4, from memory), the log-normal mean
exp(mu + sigma^2 / 2) as SciPy's ``lognorm`` gives it, the inverse of the
information by numpy's ``linalg.inv``, and percentiles by numpy. Simulation
recovery on invented data: the 5th-95th ranges cover the value at the true
settings at about their nominal rate, and narrow as the base grows.
"""

from __future__ import annotations

import dataclasses
import json

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose
from scipy import stats

from builders import MODEL, POLICY, PROCESS, simulated_panel, small_panel
from lapsewise.app import pipeline
from lapsewise.data.histories import compress, mailed_silent_histories
from lapsewise.decide.decisions import decide
from lapsewise.decide.program import solve
from lapsewise.decide.stop_table import with_ranges
from lapsewise.errors import InputError
from lapsewise.files.policy_file import Economics, Policy, Segments
from lapsewise.model import optimum
from lapsewise.model.churn import fit_churn
from lapsewise.model.fitted import Model, load_model
from lapsewise.model.posterior import posterior
from lapsewise.model.uncertainty import (
    RANGE,
    Covariance,
    churn_estimates,
    draw_parameters,
    drawn_churn,
    model_draws,
    shifted_models,
    to_unconstrained,
)

DISCOUNT = 1.1 ** -0.25
MARGIN, PIECE, HORIZON = 20.0, 0.9, 8


def mailing_values(process, histories):
    """The value of mailing now at every history's state, looking HORIZON quarters ahead (the program's own decision)."""
    post = posterior(process, histories)
    program = solve(
        process, MARGIN, PIECE, DISCOUNT, HORIZON,
        n_max=int(histories.n.max()), b_max=int(histories.unmailed_quarters.max()), n_min=int(histories.n.min()), x_max=int(histories.x.max()),
    )
    return decide(program, histories.n, histories.x, histories.unmailed_quarters, post.alive_now).value_of_mailing


def drawn_processes(fit, draws, seed):
    rng = np.random.default_rng(seed)
    return [drawn_churn(fit, values).process for values in draw_parameters(churn_estimates(fit), fit.covariance, draws, rng)]


# ---------------------------------------------------------------- the covariance and the draws


def test_covariance_is_the_inverse_of_the_observed_information():
    # numpy's linalg.inv of customers x curvature on the free coordinates; the fixed one is left out.
    curvature = np.array([[2.0, 0.3, 0.1], [0.3, 1.0, 0.2], [0.1, 0.2, 0.5]])
    matrix = optimum.covariance(curvature, 1000.0, [True, False, True])
    assert_allclose(matrix, np.linalg.inv(1000.0 * curvature[np.ix_([0, 2], [0, 2])]), rtol=1e-12)
    assert optimum.covariance(np.array([[-1.0]]), 10.0, [True]) is None  # not positive definite: no covariance


def test_the_standard_errors_are_the_roots_of_the_covariance_diagonal_carried_by_the_delta_method():
    fit = fit_churn(compress(simulated_panel(3000, 5)), True)
    cov = fit.covariance
    assert cov.parameters == ("alpha", "beta", "gamma", "delta", "rho")
    for i, name in enumerate(cov.parameters):
        value = getattr(fit, name)
        # Delta method: se(u) = g'(value) se(value) with g = log (g' = 1/value) or logit (g' = 1/(value (1 - value))).
        slope = 1.0 / (value * (1.0 - value)) if name == "rho" else 1.0 / value
        assert_allclose(np.sqrt(cov.matrix[i, i]), slope * fit.std_errors[name], rtol=1e-9)


def test_draws_have_the_covariance_and_log_normal_means():
    estimates = {"alpha": 0.8, "rho": 0.3, "p": 5.0}
    matrix = np.array([[0.04, 0.01, 0.0], [0.01, 0.09, -0.02], [0.0, -0.02, 0.01]])
    cov = Covariance(("alpha", "rho", "p"), matrix)
    draws = draw_parameters(estimates, cov, 40_000, np.random.default_rng(7))
    u = np.array([[to_unconstrained(name, d[name]) for name in cov.parameters] for d in draws])
    assert_allclose(np.cov(u.T), matrix, atol=0.003)
    # log-normal mean exp(mu + sigma^2 / 2) (SciPy's lognorm with s = sigma, scale = exp(mu))
    alphas = np.array([d["alpha"] for d in draws])
    assert_allclose(alphas.mean(), stats.lognorm(s=0.2, scale=0.8).mean(), rtol=0.005)
    rhos = np.array([d["rho"] for d in draws])
    assert 0.0 < rhos.min() and rhos.max() < 1.0


def test_a_zero_covariance_draws_the_estimates_exactly():
    estimates = {"alpha": 0.123456789, "rho": 0.3141592653589793}
    draws = draw_parameters(estimates, Covariance(("alpha", "rho"), np.zeros((2, 2))), 5, np.random.default_rng(1))
    assert all(d == estimates for d in draws)


def test_model_draws_are_seeded_and_a_missing_covariance_falls_back_to_the_standard_errors():
    fit = fit_churn(compress(simulated_panel(2000, 2)), True)
    model = dataclasses.replace(MODEL, churn=fit)
    first, again, other = (model_draws(model, 6, seed) for seed in (3, 3, 4))
    assert [m.churn.rho for m in first.models] == [m.churn.rho for m in again.models]
    assert [m.churn.rho for m in first.models] != [m.churn.rho for m in other.models]
    # MODEL's order-value fit has neither covariance nor standard errors: its parameters stay at the estimates.
    assert first.independent == ("the order-value model",) and first.fixed == ("spend p", "spend q", "spend gamma")
    old = model_draws(dataclasses.replace(model, churn=dataclasses.replace(fit, covariance=None)), 4000, 1)
    assert "the churn model" in old.independent and "independent" in old.notes()[0]
    rhos = np.array([m.churn.rho for m in old.models])
    assert_allclose(rhos.std(), fit.std_errors["rho"], rtol=0.06)  # delta method back to the natural scale


def test_a_multiplier_drawn_above_one_is_one():
    churn = dataclasses.replace(MODEL.churn, seasons=(1.0, 0.5, 0.8, 0.9))
    drawn = drawn_churn(churn, {**churn_estimates(churn), "season_3": 1.3})
    assert drawn.seasons == (1.0, 0.5, 1.0, 0.9)


def test_shifted_models_move_a_parameter_two_standard_errors_and_the_others_with_it():
    fit = fit_churn(compress(simulated_panel(3000, 6)), True)
    model = dataclasses.replace(MODEL, churn=fit, spend=None)
    shifted = {name: (error, lower, higher) for name, error, lower, higher in shifted_models(model)}
    assert set(shifted) == {"alpha", "beta", "gamma", "delta", "rho"}
    error, lower, higher = shifted["rho"]
    assert_allclose(error, fit.std_errors["rho"], rtol=1e-9)
    i = fit.covariance.parameters.index("rho")
    sd = np.sqrt(fit.covariance.matrix[i, i])
    assert_allclose(to_unconstrained("rho", higher.churn.rho) - to_unconstrained("rho", fit.rho), 2 * sd, rtol=1e-9)
    assert_allclose(to_unconstrained("rho", lower.churn.rho) - to_unconstrained("rho", fit.rho), -2 * sd, rtol=1e-9)
    # alpha follows by its regression on rho: Sigma[alpha, rho] / Sigma[rho, rho] per unit
    j = fit.covariance.parameters.index("alpha")
    expected = 2 * sd * fit.covariance.matrix[j, i] / fit.covariance.matrix[i, i]
    assert_allclose(np.log(higher.churn.alpha / fit.alpha), expected, rtol=1e-9)


# ---------------------------------------------------------------- the model file


def test_the_model_file_keeps_the_covariance(tmp_path):
    fit = fit_churn(compress(simulated_panel(2000, 3)), True)
    model = dataclasses.replace(MODEL, churn=fit)
    path = tmp_path / "model.json"
    path.write_text(json.dumps(model.to_dict()))
    back = load_model(path)
    assert back.churn.covariance.parameters == fit.covariance.parameters
    assert_allclose(back.churn.covariance.matrix, fit.covariance.matrix, rtol=1e-15)


@pytest.mark.parametrize(
    "covariance, message",
    [
        ({"parameters": ["alpha", "zeta"], "matrix": [[1, 0], [0, 1]]}, "churn.covariance.parameters"),
        ({"parameters": ["alpha", "beta"], "matrix": [[1, 0.5], [0.4, 1]]}, "is not symmetric"),
        ({"parameters": ["alpha"], "matrix": [[-1.0]]}, "negative variance"),
        ({"parameters": ["alpha", "beta"], "matrix": [[1, 0]]}, "2 x 2"),
        ("yes", "churn.covariance is not a table"),
    ],
)
def test_a_damaged_covariance_is_refused_with_its_key(tmp_path, covariance, message):
    data = MODEL.to_dict()
    data["churn"]["covariance"] = covariance
    path = tmp_path / "model.json"
    path.write_text(json.dumps(data))
    with pytest.raises(InputError, match=message):
        load_model(path)


# ---------------------------------------------------------------- the stop table's ranges


def test_stop_ranges_count_mailed_throughout_as_latest_and_take_the_percentiles_outward():
    economics = Economics(0.45, 4.0, 0.9, 0.10, 6)
    point = pipeline.stop_table(MODEL, Policy(economics, POLICY.versions, Segments(spend_bands=1), "test"))
    rows = len(point.rows)
    fake = []
    for stop in [2] * 9 + [-1] + [3] * 10:  # 20 draws: 45% at 2, 50% at 3, 5% mailed throughout
        fake.append(dataclasses.replace(point, rows=point.rows.assign(stop_after=np.full(rows, stop))))
    ranged = with_ranges(dataclasses.replace(point, rows=point.rows.assign(stop_after=np.full(rows, 3))), fake)
    # numpy's quantile, method "lower" at 5% and "higher" at 95% of [2]*9 + [3]*10 + [7 (after the horizon)]
    assert (ranged.rows.stop_after_low == 2).all() and (ranged.rows.stop_after_high == -1).all()
    assert_allclose(ranged.rows.agreement, 0.5)


def test_with_no_uncertainty_every_output_equals_the_plug_in_result(tmp_path):
    """Standard errors forced to zero: the stop table, the values, the plan and the mail list equal the estimates'."""
    fit = fit_churn(compress(small_panel()), True)
    certain = dataclasses.replace(
        MODEL,
        churn=dataclasses.replace(fit, covariance=Covariance(fit.covariance.parameters, np.zeros_like(fit.covariance.matrix))),
        spend=dataclasses.replace(MODEL.spend, covariance=Covariance(("p", "q", "gamma"), np.zeros((3, 3)))),
    )
    policy = Policy(Economics(0.45, 4.0, 0.9, 0.10, 6), POLICY.versions, Segments(), "test")
    plain = pipeline.stop_table(certain, policy)
    ranged = pipeline.stop_table(certain, policy, draws=5, seed=2)
    pd.testing.assert_frame_equal(ranged.rows[plain.rows.columns], plain.rows)
    assert (ranged.rows.stop_after_low == plain.rows.stop_after).all() and (ranged.rows.stop_after_high == plain.rows.stop_after).all()
    assert (ranged.rows.agreement == 1.0).all()
    panel = small_panel()
    point_values = pipeline.value_customers(certain, panel, policy)
    averaged = pipeline.value_customers(certain, panel, policy, draws=model_draws(certain, 5, 2))
    assert np.array_equal(averaged.values, point_values.values)
    budget = 0.3 * float(np.maximum(point_values.values, 0).astype(bool).any(axis=1).sum())
    point_plan, averaged_plan = pipeline.plan(point_values, policy, budget), pipeline.plan(averaged, policy, budget)
    assert np.array_equal(point_plan.assignment, averaged_plan.assignment)
    assert averaged_plan.expected_profit == point_plan.expected_profit
    assert averaged_plan.profit_range == (point_plan.expected_profit, point_plan.expected_profit)
    rows = pipeline.mail_list_rows(averaged, averaged_plan)
    pd.testing.assert_frame_equal(rows[pipeline.mail_list_rows(point_values, point_plan).columns], pipeline.mail_list_rows(point_values, point_plan))
    assert (rows.value_low == rows.value_of_mailing).all() and not rows.may_flip.any()


# ---------------------------------------------------------------- by simulation: coverage and decision quality


PROBES = compress(simulated_panel(400, 999))
"""Fixed histories at which the value of mailing is compared with its value at the true settings."""


def coverage_and_widths(customers: int, replications: int, draws: int = 40):
    """Over replications (fixed seeds): fit on a simulated base, draw, and check the 5th-95th range of the value of
    mailing at the probe histories against the value at the true settings."""
    truth = mailing_values(PROCESS, PROBES)
    covered, widths = [], []
    for seed in range(replications):
        fit = fit_churn(compress(simulated_panel(customers, 100 + seed)), True)
        values = np.array([mailing_values(process, PROBES) for process in drawn_processes(fit, draws, seed)])
        low, high = np.quantile(values, RANGE, axis=0)
        covered.append((low <= truth) & (truth <= high))
        widths.append(high - low)
    return np.array(covered), np.array(widths)


def test_the_ranges_cover_the_value_at_the_true_settings_at_about_the_nominal_rate():
    # 90% nominal. Probes share a replication's fit, so the error is judged across replications: 60 of them give a
    # binomial standard error of about 0.04 for independent ones; allow 0.78 to 0.99 (three of those).
    covered, _ = coverage_and_widths(2000, 60)
    rate = covered.mean()
    assert 0.78 <= rate <= 0.99, f"coverage {rate:.3f}"


def test_the_ranges_narrow_as_the_base_grows():
    # Asymptotic widths shrink as 1 / sqrt(customers): four times the base, half the width.
    _, small = coverage_and_widths(1000, 12, draws=30)
    _, large = coverage_and_widths(4000, 12, draws=30)
    ratio = np.median(small) / np.median(large)
    assert 1.5 <= ratio <= 2.8, f"width ratio {ratio:.2f}"


def test_deciding_on_the_average_over_draws_earns_at_least_the_plug_in_decision():
    """Small bases (200 customers): each replication scores both decisions at every customer's history with the value
    of mailing at the true settings; the paired difference, summed over replications, is not below zero by more than
    two of its standard errors."""
    differences = []
    for seed in range(40):
        panel = simulated_panel(200, 500 + seed)
        histories = compress(panel)
        fit = fit_churn(histories, True)
        truth = mailing_values(PROCESS, histories)
        plug_in = mailing_values(fit.process, histories) > 0
        averaged = np.mean([mailing_values(process, histories) for process in drawn_processes(fit, 30, seed)], axis=0) > 0
        differences.append(float(np.dot(histories.count, truth * (averaged.astype(float) - plug_in.astype(float)))))
    differences = np.array(differences)
    total, error = differences.sum(), differences.std(ddof=1) * np.sqrt(len(differences))
    assert total >= -2 * error, f"averaged minus plug-in {total:.2f} (se {error:.2f})"
    assert (differences != 0).any()  # the two decisions do differ on some replications


def test_draws_that_would_not_fit_in_memory_are_refused_before_any_work(monkeypatch):
    monkeypatch.setattr(pipeline, "available_memory", lambda: 10_000_000)  # 10 MB free
    with pytest.raises(InputError, match=r"--draws 1000: .* use --draws 6 or fewer, or --plug-in"):
        pipeline.check_draws_memory(1000, 100_000, 2)
    pipeline.check_draws_memory(6, 100_000, 2)  # 9.6 MB: fits


def test_a_seasonal_model_draws_its_multipliers_and_its_stop_table_takes_ranges():
    from builders import seasonal_panel
    from lapsewise.model.fitted import fit_model

    model = fit_model(seasonal_panel(3000, 2))
    covariance = model.churn.covariance
    reference = model.churn.seasons.index(1.0)
    assert f"season_{reference + 1}" not in covariance.parameters  # held at 1 by the scaling: no error, not drawn
    assert {f"season_{q + 1}" for q in range(4) if q != reference} <= set(covariance.parameters)
    drawn = np.array([m.churn.seasons for m in model_draws(model, 60, 1).models])
    assert drawn.max() <= 1.0 and (drawn[:, reference] == 1.0).all()
    spread = drawn.std(axis=0)
    i = covariance.parameters.index("rho")
    assert all(spread[q] > 0 for q in range(4) if q != reference)
    for q in range(4):
        if q != reference and model.churn.seasons[q] < 0.8:  # far from the cap at 1: the spread is the standard error's
            assert_allclose(spread[q], model.churn.std_errors[f"season_{q + 1}"], rtol=0.35)
    assert covariance.matrix[i, i] > 0
    policy = Policy(Economics(0.45, 4.0, 0.9, 0.10, 4), POLICY.versions, Segments(spend_bands=1), "test")
    table = pipeline.stop_table(model, policy, draws=3, seed=1)
    assert table.draws == 3 and table.rows["agreement"].between(0, 1).all()


def test_the_ranges_are_sampling_error_only_and_miss_the_truth_of_a_world_the_model_leaves_out():
    """Out of the model's world: seasonal demand with mailing aimed at the peak (the setting of SEASONAL_TRUTH). A fit
    without seasons credits the peak's orders to the mailing and its rho draws sit far below the true 0.6; with seasons
    they cover it. The ranges measure how sure the fit is of its own model, not whether the model is right."""
    from builders import SEASONAL_TRUTH, seasonal_panel
    from lapsewise.model.fitted import fit_model

    panel = seasonal_panel(6000, 3)
    for seasons, covers in ((False, False), (True, True)):
        model = fit_model(panel, seasons=seasons)
        rhos = np.array([m.churn.rho for m in model_draws(model, 200, 5).models])
        low, high = np.quantile(rhos, RANGE)
        assert (low <= SEASONAL_TRUTH["rho"] <= high) == covers, f"seasons={seasons}: rho range {low:.3f}-{high:.3f}"

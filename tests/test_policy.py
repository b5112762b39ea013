"""The policy file, the stop table and the simulation check of the stop-rule program."""

from pathlib import Path

import numpy as np
import pytest
from numpy.testing import assert_allclose

from lapsewise.churn import ChurnFit, mailed_silent_histories, posterior
from lapsewise.errors import InputError
from lapsewise.model import Model
from lapsewise.policy import Beliefs, Economics, build_stop_table, decide, load_policy, solve, spend_bands
from lapsewise.spend import SpendFit
from lapsewise.simulate import simulate_policies

POLICIES = Path(__file__).parent.parent / "policies"
ECONOMICS = """
[economics]
gross_margin = 0.45
order_cost = 4.00
piece_cost = 0.90
annual_discount_rate = 0.10
horizon_quarters = 40
"""


def write(tmp_path, text, name="policy.toml"):
    path = tmp_path / name
    path.write_text(text)
    return path


# ---------------------------------------------------------------- the policy file


@pytest.mark.parametrize("name", sorted(p.name for p in POLICIES.glob("*.toml")))
def test_example_policy_files_load(name):
    policy = load_policy(POLICIES / name)
    assert policy.economics.horizon_quarters >= 1
    assert len(policy.versions) >= 1


def test_overrides_replace_file_values(tmp_path):
    policy = load_policy(write(tmp_path, ECONOMICS), {"piece_cost": 1.10, "order_value": 80.0, "gross_margin": None})
    assert policy.economics.piece_cost == 1.10
    assert policy.economics.order_value == 80.0
    assert policy.economics.gross_margin == 0.45


@pytest.mark.parametrize(
    "change, message",
    [
        (("piece_cost = 0.90", "piece_cost = -0.5"), "piece_cost"),
        (("gross_margin = 0.45", "gross_margin = 1.4"), "gross_margin"),
        (("order_cost = 4.00", "order_cost = 4.00\nshipping = 2"), "unknown key 'shipping'"),
        (("horizon_quarters = 40", ""), "missing 'horizon_quarters'"),
        (("horizon_quarters = 40", "horizon_quarters = 2.5"), "horizon_quarters"),
        (("piece_cost = 0.90", 'piece_cost = "cheap"'), "piece_cost"),
        (("[economics]", "[economics"), "not valid TOML"),
    ],
)
def test_bad_policy_files_name_the_key(tmp_path, change, message):
    with pytest.raises(InputError, match=message):
        load_policy(write(tmp_path, ECONOMICS.replace(*change)))


def test_bad_override_names_the_key(tmp_path):
    with pytest.raises(InputError, match="piece_cost"):
        load_policy(write(tmp_path, ECONOMICS), {"piece_cost": -1.0})


def test_versions_replace_the_economics_piece_cost(tmp_path):
    text = ECONOMICS + '\n[[versions]]\nname = "slim"\npiece_cost = 0.5\nresponse = 0.8\nsetup_cost = 100\nmin_quantity = 500\n'
    policy = load_policy(write(tmp_path, text))
    assert [v.name for v in policy.versions] == ["slim"]
    assert policy.versions[0].piece_cost == 0.5 and policy.versions[0].min_quantity == 500
    bad = ECONOMICS + '\n[[versions]]\nname = "slim"\npiece_cost = 0.5\ncolour = "red"\n'
    with pytest.raises(InputError, match="unknown key 'colour'"):
        load_policy(write(tmp_path, bad))


# ---------------------------------------------------------------- the program against outside results

DISCOUNT = 1.10**-0.25
FIT = ChurnFit(alpha=1.1, beta=2.4, gamma=0.7, delta=4.5, rho=0.3)


def silent_states(rho, count=60, seed=0):
    rng = np.random.default_rng(seed)
    x = rng.integers(0, 8, count)
    t_x = x + rng.integers(0, 6, count)
    k = rng.integers(0, 10, count)
    beliefs = Beliefs(FIT.alpha, FIT.beta, FIT.gamma, FIT.delta, rho)
    hist = mailed_silent_histories(x, t_x, k)
    post = posterior(beliefs.churn_fit(), hist)
    return beliefs, t_x + k, x, post.alive_now[hist.inverse], post.p_buy[hist.inverse]


@pytest.mark.parametrize("margin", [3.0, 8.0, 20.0])
def test_horizon_one_is_the_breakeven_rule(margin):
    # Common practice, no source: mail exactly when P(order) x margin >= piece cost.
    beliefs, n, x, alive, p_buy = silent_states(0.0)
    program = solve(beliefs, margin, 0.9, DISCOUNT, 1, n_max=int(n.max()), b_max=0)
    decision = decide(program, n, x, np.zeros_like(n), alive)
    np.testing.assert_array_equal(decision.mail, p_buy * margin >= 0.9)
    # The value of mailing is the discounted one-quarter difference.
    assert_allclose(decision.value_of_mailing, DISCOUNT * (p_buy * margin - 0.9), rtol=1e-12, atol=1e-12)


def test_horizon_one_with_unprompted_orders_counts_only_the_orders_the_piece_adds():
    # With held customers ordering at rho times the rate, the piece adds (1 - rho) P(order).
    beliefs, n, x, alive, p_buy = silent_states(0.3)
    program = solve(beliefs, 8.0, 0.9, DISCOUNT, 1, n_max=int(n.max()), b_max=0)
    decision = decide(program, n, x, np.zeros_like(n), alive)
    np.testing.assert_array_equal(decision.mail, (1 - 0.3) * p_buy * 8.0 >= 0.9)


@pytest.mark.parametrize("p, theta", [(0.3, 0.1), (0.6, 0.25), (0.15, 0.05)])
def test_free_mailing_of_a_single_customer_type_gives_the_margin_multiple(p, theta):
    # Gupta & Lehmann (2003), "Customers as Assets", J. Interactive Marketing 17(1):
    # value of a customer alive now = m * r / (1 + i - r), with m = p * margin per quarter,
    # r = 1 - theta the retention rate and i the quarterly discount rate.
    concentration = 1e7  # Beta distributions this tight make everyone the same type
    beliefs = Beliefs(p * concentration, (1 - p) * concentration, theta * concentration, (1 - theta) * concentration, 0.0)
    margin, horizon = 20.0, 120
    program = solve(beliefs, margin, 0.0, DISCOUNT, horizon, n_max=0, b_max=0)
    decision = decide(program, np.array([0]), np.array([0]), np.array([0]), np.array([1.0]))
    i, r = 1 / DISCOUNT - 1, 1 - theta
    truncation = 1 - (r / (1 + i)) ** horizon  # the sum stops after the horizon
    assert_allclose(decision.value[0], p * margin * r / (1 + i - r) * truncation, rtol=1e-5)


def test_with_rho_zero_the_policy_is_a_stopping_rule():
    # Holding teaches nothing when held customers cannot order: once dropped, never mailed again.
    beliefs = Beliefs(FIT.alpha, FIT.beta, FIT.gamma, FIT.delta, 0.0)
    program = solve(beliefs, 12.0, 0.9, DISCOUNT, 20, n_max=40, b_max=25)
    for x, t_x in [(0, 0), (2, 5), (6, 9)]:
        decisions = []
        b = 0
        for k in range(25):
            hist = mailed_silent_histories(np.array([x]), np.array([t_x]), np.array([k]))
            alive = posterior(beliefs.churn_fit(), hist).alive_now[0]
            decisions.append(bool(decide(program, np.array([t_x + k]), np.array([x]), np.array([b]), np.array([alive])).mail[0]))
        first_hold = decisions.index(False) if False in decisions else len(decisions)
        assert all(decisions[:first_hold]) and not any(decisions[first_hold:])


def demo_model(spend=None):
    return Model(churn=FIT, spend=spend, as_of="2025-12-31", end_quarter=8103, fiscal_year_start=1, customers=1)


def stop_points(table):
    stop = table.rows["stop_after"].to_numpy().astype(float)
    return np.where(stop < 0, np.inf, stop)


def test_stop_point_moves_earlier_as_piece_cost_rises_and_later_as_margin_rises():
    model = demo_model()
    base = dict(gross_margin=0.45, order_cost=4.0, annual_discount_rate=0.10, horizon_quarters=16, order_value=45.0)
    by_cost = [stop_points(build_stop_table(model, Economics(piece_cost=c, **base))) for c in (0.5, 0.9, 1.5, 2.5)]
    for cheaper, dearer in zip(by_cost, by_cost[1:]):
        assert np.all(dearer <= cheaper)
    assert np.any(by_cost[-1] < by_cost[0])
    base.pop("gross_margin")
    by_margin = [stop_points(build_stop_table(model, Economics(gross_margin=g, piece_cost=0.9, **base))) for g in (0.35, 0.45, 0.6)]
    for lower, higher in zip(by_margin, by_margin[1:]):
        assert np.all(higher >= lower)
    assert np.any(by_margin[-1] > by_margin[0])


def test_stop_table_covers_every_state_up_to_the_horizon():
    table = build_stop_table(demo_model(), Economics(0.45, 4.0, 0.9, 0.10, 6, order_value=45.0))
    pairs = set(zip(table.rows.frequency, table.rows.last_purchase_quarter))
    # (0, 0) and every 1 <= x <= t_x <= 6: 1 + 6 * 7 / 2 = 22 states.
    assert len(pairs) == 22 and (0, 0) in pairs and (6, 6) in pairs and (1, 6) in pairs
    # A customer is mailed exactly while k < stop_after.
    cells = table.cells.merge(table.rows, on=["spend_band", "frequency", "last_purchase_quarter"])
    stop = np.where(cells.stop_after < 0, np.inf, cells.stop_after)
    np.testing.assert_array_equal(cells["mail"].to_numpy(), cells.silent_quarters.to_numpy() < stop)


def test_stop_table_needs_an_order_value():
    with pytest.raises(InputError, match="order_value"):
        build_stop_table(demo_model(spend=None), Economics(0.45, 4.0, 0.9, 0.10, 8))


def test_spend_bands_cut_the_gamma_gamma_population_at_its_quantiles():
    # The mean order value of a gamma-gamma customer is p / nu with nu ~ Gamma(q, rate gamma), so its u-quantile
    # is p / (the (1 - u)-quantile of nu); the reference quantile is SciPy's gamma distribution.
    from scipy import stats

    # Parameter values of the size Fader, Hardie & Lee (2005) report (from memory); any with q > 1 would do.
    spend = SpendFit(p=6.25, q=3.74, gamma=15.44, std_errors={}, log_likelihood=0.0, customers=1, converged=True)
    bands = spend_bands(demo_model(spend=spend), Economics(0.45, 4.0, 0.9, 0.10, 8), 3)

    def quantile(u):
        return 6.25 / stats.gamma.ppf(1.0 - u, 3.74, scale=1.0 / 15.44)

    assert [b.label for b in bands] == ["low", "middle", "high"]
    assert bands[0].low == 0.0 and bands[-1].high == np.inf
    assert_allclose([b.high for b in bands[:-1]], [quantile(1 / 3), quantile(2 / 3)], rtol=1e-10)
    assert_allclose([b.order_value for b in bands], [quantile(1 / 6), quantile(1 / 2), quantile(5 / 6)], rtol=1e-10)


# ---------------------------------------------------------------- simulation


@pytest.mark.parametrize("rho", [0.0, 0.3])
def test_simulated_optimal_policy_matches_the_program_and_beats_every_rule(rho):
    beliefs = Beliefs(FIT.alpha, FIT.beta, FIT.gamma, FIT.delta, rho)
    economics = Economics(0.45, 4.0, 0.9, 0.10, 12)
    result = simulate_policies(beliefs, economics, 45.0, customers=40_000, quarters=12, seed=5)
    summary = result.summary.set_index("policy")
    optimal = summary.loc["optimal"]
    # The program's value of a new customer lies within 4 standard errors of the simulated mean.
    assert abs(result.program_value - optimal.mean_profit) < 4 * optimal.profit_std_error
    # No rule of thumb beats the optimal policy by more than 4 standard errors of the paired difference.
    others = summary.drop(index="optimal")
    assert np.all(others.difference_to_optimal < 4 * others.difference_std_error)
    # And the crude rules lose clearly.
    assert others.loc["always mail", "difference_to_optimal"] < -4 * others.loc["always mail", "difference_std_error"]
    assert others.loc["drop after 1", "difference_to_optimal"] < -4 * others.loc["drop after 1", "difference_std_error"]


def test_simulation_is_deterministic_for_a_seed():
    beliefs = Beliefs(FIT.alpha, FIT.beta, FIT.gamma, FIT.delta, 0.3)
    economics = Economics(0.45, 4.0, 0.9, 0.10, 6)
    first = simulate_policies(beliefs, economics, 45.0, 2000, 6, seed=9).to_dict()
    second = simulate_policies(beliefs, economics, 45.0, 2000, 6, seed=9).to_dict()
    assert first == second


def test_demo_economics_match_the_full_catalog_policy_file():
    from lapsewise.demo import DEMO_ECONOMICS

    economics = load_policy(POLICIES / "full-catalog.toml").economics
    for key, value in DEMO_ECONOMICS.items():
        assert getattr(economics, key) == value, key

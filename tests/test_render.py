"""Rendering: tables and readings that show what the stages computed, the units, and the cautions."""

import io

from rich.console import Console

from builders import MODEL, POLICY, small_panel
from lapsewise.app import pipeline, render
from lapsewise.budget.mail_list import decision_counts, mail_list
from lapsewise.files.policy_file import Economics, Policy, Segments, Version


def recorded(print_function, *args) -> str:
    console = Console(file=io.StringIO(), width=200, no_color=True, highlight=False)
    print_function(console, *args)
    return console.file.getvalue()


def test_the_cautions_name_personal_data_suppression_law_and_estimates():
    text = recorded(render.print_caution)
    for phrase in ("personal data", "suppression lists", "data-protection law", "estimates, not guarantees"):
        assert phrase in text


def test_the_plan_shows_the_plans_own_totals_and_shadow_price():
    values = pipeline.value_customers(MODEL, small_panel(), POLICY)
    plan = pipeline.plan(values, POLICY, 60.0)
    text = recorded(render.print_plan, plan, small_panel(), values)
    totals = plan.totals
    total_line = next(line for line in text.splitlines() if line.strip().startswith("Total"))
    assert f"{totals['mailed']:,}" in total_line and f"{totals['cost']:,.0f}" in total_line
    assert f"worth about {plan.shadow_price:.2f}" in text
    assert "currency units" in text  # the units of the money columns


def test_the_mail_list_counts_are_the_lists_own():
    values = pipeline.value_customers(MODEL, small_panel(), POLICY)
    plan = pipeline.plan(values, POLICY, 60.0)
    counts = decision_counts(mail_list(values, plan.assignment))
    text = recorded(render.print_mail_list, counts, plan, "list.csv")
    assert f"mail {counts['mail']:,} customers" in text
    assert sum(counts.values()) == len(values.customer_ids)


def test_the_stop_table_reading_quotes_the_tables_stop_point():
    economics = Economics(0.45, 4.0, 0.9, 0.10, 8)
    table = pipeline.stop_table(MODEL, Policy(economics, (Version("full", 0.9),), Segments(), "test"))
    text = " ".join(recorded(render.print_stop_table, table, MODEL).split())
    for band in table.bands:
        row = table.rows[(table.rows.spend_band == band.label) & (table.rows.frequency == 0)].iloc[0]
        stop = "mailed all 8 q" if row.stop_after < 0 else f"after {int(row.stop_after)}"
        assert f"Stop mailing one-time buyers in the '{band.label}' band {stop} silent quarters" in text
    data = render.stop_table_json(table, MODEL)
    assert len(data["rows"]) == len(table.rows) and data["unmailed_response_used"] == table.process.rho


def test_money_shows_missing_values_as_a_dash():
    assert render.money(None) == "-" and render.money(float("nan")) == "-" and render.money(1234.5) == "1,234.50"


def test_a_seasonal_model_is_planned_on_the_calendar_only_where_the_data_support_its_seasons():
    import dataclasses

    from lapsewise.decide.program import decision_process

    economics = Economics(0.45, 4.0, 0.9, 0.10, 8)
    policy = Policy(economics, (Version("full", 0.9),), Segments(), "test")
    loose = dataclasses.replace(
        MODEL, churn=dataclasses.replace(MODEL.churn, seasons=(1.0, 0.5, 0.4, 0.7), std_errors={f"season_{q}": 0.4 for q in range(1, 5)})
    )
    table = pipeline.stop_table(loose, policy)
    text = " ".join(recorded(render.print_stop_table, table, loose).split())
    assert not table.calendar
    assert "all within 5% or two standard errors of 1, so the stop rule plans every quarter as an average one (multiplier 0.65)" in text
    # The process it plans with has the mean p of an average quarter: alpha / (alpha + beta') = 0.65 alpha / (alpha + beta).
    plain = decision_process(MODEL.churn)
    averaged = decision_process(loose.churn)
    assert abs(averaged.mean_p - 0.65 * plain.mean_p) < 1e-12 and averaged.alpha == plain.alpha
    assert table.process.beta == averaged.beta
    # Seasons the data support (here no standard errors to say otherwise): the calendar program, a row per quarter of the last order.
    firm = dataclasses.replace(MODEL, churn=dataclasses.replace(MODEL.churn, seasons=(1.0, 0.5, 0.4, 0.7)))
    table = pipeline.stop_table(firm, policy)
    text = " ".join(recorded(render.print_stop_table, table, firm).split())
    assert table.calendar and table.seasonal
    assert "Sales by quarter of the year: Q1 1.00, Q2 0.50, Q3 0.40, Q4 0.70 (the model's seasons)" in text
    assert "against one piece and every quarter alike" in text and "Last order in" in text
    # Without seasons nothing is said.
    assert "seasons" not in " ".join(recorded(render.print_stop_table, pipeline.stop_table(MODEL, policy), MODEL).split())
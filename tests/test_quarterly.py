"""The customer-quarter table: the same panel as the raw orders and mailings it summarises."""

import subprocess
import sys

import numpy as np
import pandas as pd
import pytest

from lapsewise.errors import InputError
from lapsewise.panel import panel_from_files

ORDERS = """customer_id,order_date,amount
A,2023-01-15,40
A,2023-02-20,10
A,2023-08-03,25
A,2023-08-30,-25
B,2023-04-02,60
B,2024-01-09,15
C,2023-11-11,30
"""
MAILINGS = """customer_id,mail_date
A,2023-04-01
A,2023-07-01
B,2023-07-01
B,2023-10-01
C,2024-01-01
"""
# The same history as one row per customer and quarter with a purchase or a mailing
# (what GROUP BY customer_id, quarter gives): A's third quarter nets to 0, so it is not a purchase.
QUARTERS = """customer_id,quarter,purchased,spend,mailed
A,2023-01-01,1,50,0
A,2023-04-01,0,0,1
A,2023-07-01,0,0,1
B,2023-04-01,1,60,0
B,2023-07-01,0,0,1
B,2023-10-01,0,0,1
B,2024-01-01,1,15,0
C,2023-10-01,1,30,0
C,2024-01-01,0,0,1
"""


def write(tmp_path, name, text):
    path = tmp_path / name
    path.write_text(text)
    return str(path)


def test_quarterly_table_gives_the_same_panel_as_orders_and_mailings(tmp_path):
    raw = panel_from_files(write(tmp_path, "orders.csv", ORDERS), write(tmp_path, "mailings.csv", MAILINGS), as_of="2024-03-31")
    table = panel_from_files(write(tmp_path, "quarters.csv", QUARTERS))
    assert table.mailing_history and table.end_quarter == raw.end_quarter
    np.testing.assert_array_equal(table.customer_ids, raw.customer_ids)
    np.testing.assert_array_equal(table.first_quarter, raw.first_quarter)
    np.testing.assert_array_equal(table.purchased, raw.purchased)
    np.testing.assert_array_equal(table.mailed, raw.mailed)
    np.testing.assert_allclose(table.spend, raw.spend)


def test_quarterly_table_as_parquet_and_without_mailed_column(tmp_path):
    frame = pd.read_csv(pd.io.common.StringIO(QUARTERS)).drop(columns="mailed")
    path = tmp_path / "quarters.parquet"
    frame.to_parquet(path)
    panel = panel_from_files(str(path))
    assert not panel.mailing_history
    # Without a mailed column every quarter after the first purchase counts as mailed.
    assert panel.mailed[:, 1:].sum() == panel.n.sum()


def test_quarterly_table_refuses_a_separate_mailings_file(tmp_path):
    with pytest.raises(InputError, match="drop --mailings"):
        panel_from_files(write(tmp_path, "quarters.csv", QUARTERS), write(tmp_path, "mailings.csv", MAILINGS))


def test_quarterly_flags_must_be_zero_or_one(tmp_path):
    with pytest.raises(InputError, match="row 3, column purchased: 'maybe'"):
        panel_from_files(write(tmp_path, "quarters.csv", QUARTERS.replace("A,2023-04-01,0,0,1", "A,2023-04-01,maybe,0,1")))


def test_every_command_reads_the_quarterly_table(tmp_path):
    path = write(tmp_path, "quarters.csv", QUARTERS)
    result = subprocess.run([sys.executable, "-m", "lapsewise", "summary", path], capture_output=True, text=True)
    assert result.returncode == 0, result.stderr
    assert "3 customers" in result.stdout
    # Output to a pipe shows no progress bar.
    fit = subprocess.run([sys.executable, "-m", "lapsewise", "fit", path, "--out", str(tmp_path / "m.json")], capture_output=True, text=True)
    assert fit.returncode == 0, fit.stderr
    assert "\x1b[?25l" not in fit.stdout and "━" not in fit.stderr


def test_an_as_of_centuries_after_the_orders_is_refused_before_memory_is_spent(tmp_path):
    with pytest.raises(InputError, match="up to 400 quarters"):
        panel_from_files(write(tmp_path, "orders.csv", ORDERS), as_of="2200-12-31")

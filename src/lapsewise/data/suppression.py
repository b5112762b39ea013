"""The suppression list matched against the customer base: who is never mailed, and whether the list fits the base.

Ids on both sides are in the one canonical text form of :func:`lapsewise.files.cells.canonical_ids`
(spaces trimmed, Unicode composed, whole numbers written plainly), so an id written ``1.0`` in one
file and ``1`` in the other, or with an accent typed two ways, is the same person. A list that
matches nobody in the base is almost always a format mismatch (another id column, ids with a
prefix), and mailing everyone in that case is the one mistake a suppression list exists to
prevent: it is refused.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from lapsewise.data.panel import Panel
from lapsewise.errors import InputError
from lapsewise.files.inputs import ID_COLUMN, Loaded

FEW_MATCHED = 0.5
"""Below this share of its ids matching the base, a suppression list is reported with a warning."""


@dataclass(frozen=True)
class Suppression:
    """A suppression list against the base: ``flags`` per customer of the panel, the list's distinct ids, and how many matched."""

    source: str
    flags: np.ndarray
    listed: int
    matched: int

    @property
    def few_matched(self) -> bool:
        return self.matched < FEW_MATCHED * self.listed

    def to_dict(self) -> dict:
        return {"file": self.source, "ids_listed": self.listed, "ids_matched": self.matched}


def match_suppression(panel: Panel, listed: Loaded, orders_name: str = "the orders") -> Suppression:
    """Mark the panel's customers who are on the list; refuse a list of which no id is a customer."""
    ids = listed.frame[ID_COLUMN].to_numpy()
    flags = np.isin(panel.customer_ids, ids)
    matched = int(flags.sum())
    refuse_if_none_match(listed.name, ids, matched, panel, orders_name, "check that both files hold the same kind of id, or pass --id-column")
    return Suppression(listed.name, flags, len(ids), matched)


def refuse_if_none_match(name: str, ids: np.ndarray, matched: int, panel: Panel, orders_name: str, fix: str) -> None:
    """Refuse a list of ids of which none is a customer (almost always a format mismatch), showing an id of each side."""
    if len(ids) and matched == 0:
        example = str(ids[0])[:20]
        base = str(panel.customer_ids[0])[:20] if panel.customers else "-"
        raise InputError(
            f"{name}: none of its {len(ids):,} ids is a customer in {orders_name} (its ids look like '{example}', "
            f"the customers' like '{base}'); {fix}"
        )

"""The policy file: the economics of a mailing, the segments of the budget plan and the versions of the piece.

A policy file is TOML with three parts, ``[economics]``, ``[segments]`` and
``[[versions]]`` (see ``policies/`` for commented examples). A quarter of the
(fiscal) year may change any cost or margin key for itself: a table
``[economics.quarter_4]`` (quarters 1 to 4 of the fiscal year, as in the model
file's ``seasons``) overrides ``gross_margin``, ``order_cost``, ``piece_cost``
or ``order_value`` in that quarter, and ``[versions.quarter_4]`` under a
``[[versions]]`` entry its ``piece_cost`` (``policies/high-cost-season.toml``). :func:`load_policy`
reads it, applies command-line overrides of ``[economics]`` keys, and checks
every key once, here at the edge: unknown keys, missing keys and impossible
values raise :class:`~lapsewise.errors.InputError` naming the key.
"""

from __future__ import annotations

import dataclasses
import math
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

from lapsewise.errors import InputError
from lapsewise.files.tables import require_file

ECONOMICS_KEYS = {
    "gross_margin": "share of order value left after cost of goods (0 to 1)",
    "order_cost": "pick, pack and payment cost per order",
    "piece_cost": "print and postage per piece mailed",
    "annual_discount_rate": "annual discount rate (0.10 = 10%)",
    "horizon_quarters": "how many quarters ahead each decision looks",
    "order_value": "optional: a fixed value per order instead of the spend model",
    "unmailed_response": "optional: overrides the model's rho",
    "recurring_budget": "optional: true when the budget binds every quarter, so later pieces cost their price plus the budget's shadow price",
}
OPTIONAL_ECONOMICS = ("order_value", "unmailed_response", "recurring_budget")
QUARTER_KEYS = ("gross_margin", "order_cost", "piece_cost", "order_value")
"""The keys a quarter of the year may override: its costs and its margin."""
QUARTER_TABLES = tuple(f"quarter_{q}" for q in range(1, 5))
VERSION_KEYS = ("name", "piece_cost", "response", "setup_cost", "min_quantity")
SEGMENT_KEYS = ("frequency_bands", "silent_bands", "spend_bands", "min_share", "max_share")
MAX_HORIZON = 80
"""The longest horizon taken: the program's memory grows with the fourth power of the horizon (20 years need about 5 GB)."""
MAX_COST = 1e9
"""No piece or order costs this much: a larger value is a typo (and would swamp every other figure)."""
MAX_VALUE = 1e12
"""The largest order value or setup cost taken (as for amounts in the orders file)."""
MAX_QUANTITY = 1_000_000_000
AMOUNT_LIMITS = {"gross_margin": (0.0, 1.0), "order_cost": (0.0, MAX_COST), "piece_cost": (0.0, MAX_COST), "order_value": (0.0, MAX_VALUE)}
"""The range of each cost or margin key, year-round and in a quarter of its own."""
MAX_BANDS = 20


@dataclass(frozen=True)
class Economics:
    """The money side of a mailing decision (see the policy file's ``[economics]`` section)."""

    gross_margin: float
    order_cost: float
    piece_cost: float
    annual_discount_rate: float
    horizon_quarters: int
    order_value: float | None = None
    unmailed_response: float | None = None
    recurring_budget: bool = False
    quarters: tuple[tuple[tuple[str, float], ...], ...] = ((), (), (), ())
    """Per quarter of the fiscal year (0-3), the (key, value) pairs that quarter overrides."""

    @property
    def seasonal(self) -> bool:
        """True when some quarter of the year overrides a cost or the margin."""
        return any(self.quarters)

    def in_quarter(self, quarter: int) -> "Economics":
        """The economics of a quarter of the fiscal year (0-3, taken modulo 4): its overrides applied."""
        return dataclasses.replace(self, quarters=((), (), (), ()), **dict(self.quarters[quarter % 4]))

    @property
    def discount(self) -> float:
        """Quarterly discount factor ``(1 + annual_discount_rate) ** -0.25``."""
        return (1.0 + self.annual_discount_rate) ** -0.25

    def margin(self, order_value: float) -> float:
        """Contribution of one order: ``gross_margin * order_value - order_cost``."""
        return self.gross_margin * order_value - self.order_cost


@dataclass(frozen=True)
class Version:
    """A version of the piece: its cost per piece, response relative to the full piece, setup cost and minimum run."""

    name: str
    piece_cost: float
    response: float = 1.0
    setup_cost: float = 0.0
    min_quantity: int = 0
    quarter_piece_costs: tuple[float | None, float | None, float | None, float | None] = (None, None, None, None)
    """Per quarter of the fiscal year (0-3), the piece cost that quarter overrides (None: the year-round one)."""

    def piece_cost_in(self, quarter: int) -> float:
        """The piece cost in a quarter of the fiscal year (0-3, taken modulo 4)."""
        cost = self.quarter_piece_costs[quarter % 4]
        return self.piece_cost if cost is None else cost


@dataclass(frozen=True)
class Segments:
    """How customers are grouped for the budget plan."""

    frequency_bands: tuple[int, ...] = (0, 1, 2, 4, 8)
    silent_bands: tuple[int, ...] = (0, 1, 2, 4, 8)
    spend_bands: int = 3
    min_share: dict[str, float] = field(default_factory=dict)
    max_share: dict[str, float] = field(default_factory=dict)


@dataclass(frozen=True)
class Policy:
    economics: Economics
    versions: tuple[Version, ...]
    segments: Segments
    source: str = ""


def _shown(value) -> str:
    """A value as the message quotes it: short, one line."""
    text = f"{value:.6g}" if isinstance(value, float) else repr(value)
    return text if len(text) <= 40 else text[:37] + "..."


def _number(source: str, key: str, value, low: float | None = None, high: float | None = None, integer: bool = False, why: str = "") -> float:
    """A finite number in [low, high] (a whole number when ``integer``), or an InputError naming the key (and ``why`` the limit)."""
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise InputError(f"{source}: {key} = {_shown(value)} is not a number; write a plain number such as 0.45")
    if integer and int(value) != value:
        raise InputError(f"{source}: {key} = {_shown(value)} must be a whole number")
    if low is not None and value < low:
        raise InputError(f"{source}: {key} = {_shown(value)} is below {low:g}; {key} cannot be negative" if low == 0 else f"{source}: {key} = {_shown(value)} is below {low:g}")
    if high is not None and value > high:
        raise InputError(f"{source}: {key} = {_shown(value)} is above {high:g}; " + (why or f"no {key} is that large, check the value"))
    return int(value) if integer else float(value)


def _table(source: str, key: str, value, example: str) -> dict:
    if not isinstance(value, dict):
        raise InputError(f"{source}: {key} must be a table of keys (such as {example}), not {_shown(value)}")
    return value


def _economics(source: str, raw: dict, flags: tuple[str, ...] = ()) -> Economics:
    """The ``[economics]`` table; ``flags`` names the keys a command-line flag set, which hold in every quarter."""
    quarter_tables = {k: raw.pop(k) for k in list(raw) if k in QUARTER_TABLES}
    unknown = [k for k in raw if k not in ECONOMICS_KEYS]
    if unknown:
        raise InputError(f"{source}: unknown key '{unknown[0]}' in [economics]; known keys: {', '.join(ECONOMICS_KEYS)}")
    missing = [k for k in ECONOMICS_KEYS if k not in OPTIONAL_ECONOMICS and raw.get(k) is None]
    if missing:
        raise InputError(f"{source}: [economics] is missing '{missing[0]}' ({ECONOMICS_KEYS[missing[0]]}); add it or pass --{missing[0].replace('_', '-')}")
    values = {
        **{key: _number(source, key, raw[key], *AMOUNT_LIMITS[key]) for key in ("gross_margin", "order_cost", "piece_cost")},
        "annual_discount_rate": _number(source, "annual_discount_rate", raw["annual_discount_rate"], 0.0, 10.0),
        "horizon_quarters": _number(
            source, "horizon_quarters", raw["horizon_quarters"], 1, MAX_HORIZON, integer=True,
            why=f"the stop-rule program's memory grows with the fourth power of the horizon, so {MAX_HORIZON} quarters (20 years) is the most it looks ahead",
        ),
    }
    if raw.get("order_value") is not None:
        values["order_value"] = _number(source, "order_value", raw["order_value"], *AMOUNT_LIMITS["order_value"])
    if raw.get("recurring_budget") is not None:
        if not isinstance(raw["recurring_budget"], bool):
            raise InputError(f"{source}: recurring_budget = {_shown(raw['recurring_budget'])} is not true or false; write recurring_budget = true")
        values["recurring_budget"] = raw["recurring_budget"]
    if raw.get("unmailed_response") is not None:
        values["unmailed_response"] = _number(source, "unmailed_response", raw["unmailed_response"], 0.0, 1.0)
    values["quarters"] = tuple(
        _quarter_overrides(source, name, quarter_tables.get(name), QUARTER_KEYS, flags) for name in QUARTER_TABLES
    )
    return Economics(**values)


def _quarter_overrides(source: str, where: str, raw, keys: tuple[str, ...], flags: tuple[str, ...] = ()) -> tuple[tuple[str, float], ...]:
    """A quarter's table of overrides, checked; keys a command-line flag set are dropped (the flag holds all year)."""
    if raw is None:
        return ()
    raw = _table(source, where, raw, "piece_cost = 2.10")
    unknown = [k for k in raw if k not in keys]
    if unknown:
        raise InputError(f"{source}: unknown key '{unknown[0]}' in [{where}]; a quarter may override {', '.join(keys)}")
    return tuple((key, _number(source, f"{where}.{key}", raw[key], *AMOUNT_LIMITS[key])) for key in keys if key in raw and key not in flags)


def _versions(source: str, raw, economics: Economics) -> tuple[Version, ...]:
    if not raw:
        costs = tuple(dict(economics.quarters[q]).get("piece_cost") for q in range(4))
        return (Version(name="standard", piece_cost=economics.piece_cost, quarter_piece_costs=costs),)
    if not isinstance(raw, list):
        raise InputError(f"{source}: versions must be [[versions]] tables, one per version of the piece, not {_shown(raw)}")
    versions = []
    for position, entry in enumerate(raw, start=1):
        where = f"[[versions]] number {position}"
        if not isinstance(entry, dict):
            raise InputError(f"{source}: {where} is not a table of keys")
        unknown = [k for k in entry if k not in VERSION_KEYS + QUARTER_TABLES]
        if unknown:
            raise InputError(f"{source}: unknown key '{unknown[0]}' in {where}; known keys: {', '.join(VERSION_KEYS)}")
        for key in ("name", "piece_cost"):
            if key not in entry:
                raise InputError(f"{source}: {where} is missing '{key}'")
        if not isinstance(entry["name"], str):
            raise InputError(f"{source}: {where} has name = {_shown(entry['name'])}; write the name in quotes, such as \"postcard\"")
        name = entry["name"].strip()
        if not name or len(name) > 80 or not name.isprintable():
            raise InputError(f"{source}: {where} needs a name of 1 to 80 printable characters")
        versions.append(
            Version(
                name=name,
                piece_cost=_number(source, f"{name}.piece_cost", entry["piece_cost"], 0.0, MAX_COST),
                response=_number(source, f"{name}.response", entry.get("response", 1.0), 0.0, 1.0),
                setup_cost=_number(source, f"{name}.setup_cost", entry.get("setup_cost", 0.0), 0.0, MAX_VALUE),
                min_quantity=_number(source, f"{name}.min_quantity", entry.get("min_quantity", 0), 0, MAX_QUANTITY, integer=True),
                quarter_piece_costs=tuple(
                    dict(_quarter_overrides(source, f"{name}.{quarter}", entry.get(quarter), ("piece_cost",))).get("piece_cost")
                    for quarter in QUARTER_TABLES
                ),
            )
        )
    names = [v.name for v in versions]
    if len(set(names)) != len(names):
        raise InputError(f"{source}: two [[versions]] share a name; give each version its own name")
    return tuple(versions)


def _bands(source: str, key: str, value) -> tuple[int, ...]:
    if (
        not isinstance(value, list)
        or not value
        or len(value) > MAX_BANDS
        or any(isinstance(v, bool) or not isinstance(v, int) or not 0 <= v <= 10_000 for v in value)
    ):
        raise InputError(f"{source}: [segments] {key} must be a list of up to {MAX_BANDS} whole numbers such as [0, 1, 2, 4, 8]")
    if list(value) != sorted(set(value)) or value[0] != 0:
        raise InputError(f"{source}: [segments] {key} must start at 0 and rise, such as [0, 1, 2, 4, 8]")
    return tuple(value)


def _segments(source: str, raw) -> Segments:
    raw = _table(source, "segments", raw, "[segments] with frequency_bands = [0, 1, 2, 4, 8]")
    unknown = [k for k in raw if k not in SEGMENT_KEYS]
    if unknown:
        raise InputError(f"{source}: unknown key '{unknown[0]}' in [segments]; known keys: {', '.join(SEGMENT_KEYS)}")
    defaults = Segments()
    shares = {}
    for key in ("min_share", "max_share"):
        table = raw.get(key, {})
        if not isinstance(table, dict):
            raise InputError(f"{source}: [segments] {key} must be a table of segment = share, such as {{ \"5+ repeat, 0 silent\" = 1.0 }}")
        shares[key] = {str(k): _number(source, f"{key}.{k}", v, 0.0, 1.0) for k, v in table.items()}
    for segment, least in shares["min_share"].items():
        most = shares["max_share"].get(segment)
        if most is not None and least > most:
            raise InputError(
                f"{source}: [segments] segment '{segment}' has min_share {least:g} above its max_share {most:g}; "
                "the two rules contradict each other, lower min_share or raise max_share"
            )
    return Segments(
        frequency_bands=_bands(source, "frequency_bands", raw["frequency_bands"]) if "frequency_bands" in raw else defaults.frequency_bands,
        silent_bands=_bands(source, "silent_bands", raw["silent_bands"]) if "silent_bands" in raw else defaults.silent_bands,
        spend_bands=_number(source, "spend_bands", raw.get("spend_bands", defaults.spend_bands), 1, 10, integer=True),
        min_share=shares["min_share"],
        max_share=shares["max_share"],
    )


def load_policy(path: str | Path, overrides: dict | None = None) -> Policy:
    """Read a policy file (TOML) and apply command-line overrides of ``[economics]`` keys.

    Every section and key is checked for its type and a sane range; unknown keys,
    missing keys and impossible or contradictory values are InputErrors naming the key.
    """
    path = require_file(path, "see policies/ for examples", "a policy file")
    source = str(path)
    if path.stat().st_size > 1_000_000:
        raise InputError(f"{source}: is {path.stat().st_size:,} bytes, far more than a policy file holds; check the path")
    try:
        raw = tomllib.loads(path.read_text(encoding="utf-8"))
    except UnicodeDecodeError:
        raise InputError(f"{source}: is not UTF-8 text; save the policy file as UTF-8") from None
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"{source}: is not valid TOML ({exc}); see policies/ for examples") from None
    except RecursionError:
        raise InputError(f"{source}: is nested too deeply to be a policy file; see policies/ for examples") from None
    unknown = [k for k in raw if k not in ("economics", "versions", "segments")]
    if unknown:
        raise InputError(f"{source}: unknown section or key '{unknown[0]}'; a policy file has [economics], [segments] and [[versions]]")
    economics_raw = dict(_table(source, "economics", raw.get("economics", {}), "[economics] with gross_margin = 0.45"))
    flags = tuple(key for key, value in (overrides or {}).items() if value is not None)
    for key in flags:
        economics_raw[key] = overrides[key]
    economics = _economics(source, economics_raw, flags)
    versions = _versions(source, raw.get("versions", []), economics)
    segments = _segments(source, raw.get("segments", {}))
    return Policy(economics=economics, versions=versions, segments=segments, source=source)

"""The policy file and the belief-state dynamic program that decides when mailing a silent customer stops paying.

The decision is made at the start of each quarter: mail (pay the piece cost) or
hold. A customer who buys earns ``margin = gross_margin * order_value -
order_cost``. A quarter ``i`` quarters ahead is discounted by ``d ** i`` with
``d = (1 + annual_discount_rate) ** -0.25``; its cost and margin carry the same
factor.

The state is the exact posterior of the hidden-churn model given the history.
Two facts make it small:

* given that a customer is alive through quarter ``n``, the future depends only
  on ``(n, x, b)``: churn ``theta ~ Beta(gamma, delta + n)`` and purchase
  probability ``p`` with density proportional to
  ``Beta(alpha, beta) * p^x (1-p)^a (1-rho p)^b`` where ``a = n - x - b`` mailed
  and ``b`` unmailed silent quarters;
* a customer who just bought is certainly alive, so after a purchase the
  state is exactly ``(n, x, b)``. Between purchases the firm sees only
  silence, so its decisions form a fixed sequence, and the belief is the
  alive state weighted by ``P(alive)``.

The program therefore solves, for every post-purchase state and every remaining
horizon ``h``, the best plan for the coming silent stretch, ``W_h(n, x, b)``,
with the value after a future purchase taken from the same table. A plan is
"mail ``J`` quarters, then hold" (with ``rho = 0`` these are exactly the
stopping rules). Each decision then looks ``horizon_quarters`` ahead from its
own state (a rolling horizon): at a state with alive weight ``pi`` it compares
the best plan that mails now with the best plan that holds now and mails
later. Tests compare the program with a brute-force search over every
mail/hold sequence on small horizons.

References
----------
Bitran, G. R., & Mondschein, S. V. (1996). Mailing Decisions in the Catalog Sales
Industry. Management Science, 42(9), 1364-1381.

Simester, D. I., Sun, P., & Tsitsiklis, J. N. (2006). Dynamic Catalog Mailing
Policies. Management Science, 52(5), 683-696.
"""

from __future__ import annotations

import dataclasses
import math
import os
from concurrent.futures import ThreadPoolExecutor
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from scipy import special

from lapsewise.churn import ChurnFit
from lapsewise.errors import InputError
from lapsewise.load import require_file

# ---------------------------------------------------------------- the policy file

ECONOMICS_KEYS = {
    "gross_margin": "share of order value left after cost of goods (0 to 1)",
    "order_cost": "pick, pack and payment cost per order",
    "piece_cost": "print and postage per piece mailed",
    "annual_discount_rate": "annual discount rate (0.10 = 10%)",
    "horizon_quarters": "how many quarters ahead each decision looks",
    "order_value": "optional: a fixed value per order instead of the spend model",
    "unmailed_response": "optional: overrides the model's rho",
}
OPTIONAL_ECONOMICS = ("order_value", "unmailed_response")
VERSION_KEYS = ("name", "piece_cost", "response", "setup_cost", "min_quantity")
SEGMENT_KEYS = ("frequency_bands", "silent_bands", "spend_bands", "min_share", "max_share")
MAX_HORIZON = 120


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


def _number(source: str, key: str, value, low: float | None = None, high: float | None = None, integer: bool = False) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise InputError(f"{source}: {key} = {value!r} is not a number; write a plain number such as 0.45")
    if integer and int(value) != value:
        raise InputError(f"{source}: {key} = {value!r} must be a whole number")
    if low is not None and value < low:
        raise InputError(f"{source}: {key} = {value!r} is below {low}; {key} cannot be negative" if low == 0 else f"{source}: {key} = {value!r} is below {low}")
    if high is not None and value > high:
        raise InputError(f"{source}: {key} = {value!r} is above {high}")
    return int(value) if integer else float(value)


def _economics(source: str, raw: dict) -> Economics:
    unknown = [k for k in raw if k not in ECONOMICS_KEYS]
    if unknown:
        raise InputError(f"{source}: unknown key '{unknown[0]}' in [economics]; known keys: {', '.join(ECONOMICS_KEYS)}")
    missing = [k for k in ECONOMICS_KEYS if k not in OPTIONAL_ECONOMICS and raw.get(k) is None]
    if missing:
        raise InputError(f"{source}: [economics] is missing '{missing[0]}' ({ECONOMICS_KEYS[missing[0]]}); add it or pass --{missing[0].replace('_', '-')}")
    values = {
        "gross_margin": _number(source, "gross_margin", raw["gross_margin"], 0.0, 1.0),
        "order_cost": _number(source, "order_cost", raw["order_cost"], 0.0),
        "piece_cost": _number(source, "piece_cost", raw["piece_cost"], 0.0),
        "annual_discount_rate": _number(source, "annual_discount_rate", raw["annual_discount_rate"], 0.0, 10.0),
        "horizon_quarters": _number(source, "horizon_quarters", raw["horizon_quarters"], 1, MAX_HORIZON, integer=True),
    }
    if raw.get("order_value") is not None:
        values["order_value"] = _number(source, "order_value", raw["order_value"], 0.0)
    if raw.get("unmailed_response") is not None:
        values["unmailed_response"] = _number(source, "unmailed_response", raw["unmailed_response"], 0.0, 1.0)
    return Economics(**values)


def _versions(source: str, raw: list, economics: Economics) -> tuple[Version, ...]:
    if not raw:
        return (Version(name="standard", piece_cost=economics.piece_cost),)
    versions = []
    for position, entry in enumerate(raw, start=1):
        where = f"[[versions]] number {position}"
        if not isinstance(entry, dict):
            raise InputError(f"{source}: {where} is not a table of keys")
        unknown = [k for k in entry if k not in VERSION_KEYS]
        if unknown:
            raise InputError(f"{source}: unknown key '{unknown[0]}' in {where}; known keys: {', '.join(VERSION_KEYS)}")
        for key in ("name", "piece_cost"):
            if key not in entry:
                raise InputError(f"{source}: {where} is missing '{key}'")
        name = str(entry["name"]).strip()
        if not name:
            raise InputError(f"{source}: {where} has a blank name")
        versions.append(
            Version(
                name=name,
                piece_cost=_number(source, f"{name}.piece_cost", entry["piece_cost"], 0.0),
                response=_number(source, f"{name}.response", entry.get("response", 1.0), 0.0, 1.0),
                setup_cost=_number(source, f"{name}.setup_cost", entry.get("setup_cost", 0.0), 0.0),
                min_quantity=_number(source, f"{name}.min_quantity", entry.get("min_quantity", 0), 0, integer=True),
            )
        )
    names = [v.name for v in versions]
    if len(set(names)) != len(names):
        raise InputError(f"{source}: two [[versions]] share a name; give each version its own name")
    return tuple(versions)


def _bands(source: str, key: str, value) -> tuple[int, ...]:
    if not isinstance(value, list) or not value or any(isinstance(v, bool) or not isinstance(v, int) or v < 0 for v in value):
        raise InputError(f"{source}: [segments] {key} must be a list of whole numbers such as [0, 1, 2, 4, 8]")
    if list(value) != sorted(set(value)) or value[0] != 0:
        raise InputError(f"{source}: [segments] {key} must start at 0 and rise, such as [0, 1, 2, 4, 8]")
    return tuple(value)


def _segments(source: str, raw: dict) -> Segments:
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
    return Segments(
        frequency_bands=_bands(source, "frequency_bands", raw["frequency_bands"]) if "frequency_bands" in raw else defaults.frequency_bands,
        silent_bands=_bands(source, "silent_bands", raw["silent_bands"]) if "silent_bands" in raw else defaults.silent_bands,
        spend_bands=_number(source, "spend_bands", raw.get("spend_bands", defaults.spend_bands), 1, 10, integer=True),
        min_share=shares["min_share"],
        max_share=shares["max_share"],
    )


def load_policy(path: str | Path, overrides: dict | None = None) -> Policy:
    """Read a policy file (TOML) and apply command-line overrides of ``[economics]`` keys.

    Unknown keys, missing keys and impossible values are InputErrors naming the key.
    """
    path = require_file(path, "see policies/ for examples", "a policy file")
    source = str(path)
    try:
        raw = tomllib.loads(path.read_text(encoding="utf-8"))
    except UnicodeDecodeError:
        raise InputError(f"{source}: is not UTF-8 text; save the policy file as UTF-8") from None
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"{source}: is not valid TOML ({exc}); see policies/ for examples") from None
    unknown = [k for k in raw if k not in ("economics", "versions", "segments")]
    if unknown:
        raise InputError(f"{source}: unknown section or key '{unknown[0]}'; a policy file has [economics], [segments] and [[versions]]")
    economics_raw = dict(raw.get("economics", {}))
    if not isinstance(raw.get("economics", {}), dict):
        raise InputError(f"{source}: economics must be a [economics] section")
    for key, value in (overrides or {}).items():
        if value is not None:
            economics_raw[key] = value
    economics = _economics(source, economics_raw)
    versions = _versions(source, raw.get("versions", []), economics)
    segments = _segments(source, raw.get("segments", {}))
    return Policy(economics=economics, versions=versions, segments=segments, source=source)


# ---------------------------------------------------------------- the belief-state program


@dataclass(frozen=True)
class Beliefs:
    """The churn model's parameters as the program uses them (rho is the response when not mailed)."""

    alpha: float
    beta: float
    gamma: float
    delta: float
    rho: float

    @classmethod
    def from_fit(cls, fit: ChurnFit, unmailed_response: float | None = None) -> "Beliefs":
        """``unmailed_response`` overrides rho; without it and without a mailing history a held customer is assumed not to buy."""
        rho = unmailed_response if unmailed_response is not None else (fit.rho if fit.rho is not None else 0.0)
        return cls(fit.alpha, fit.beta, fit.gamma, fit.delta, float(rho))

    def churn_fit(self) -> ChurnFit:
        return ChurnFit(alpha=self.alpha, beta=self.beta, gamma=self.gamma, delta=self.delta, rho=self.rho)


@dataclass(frozen=True)
class Program:
    """The solved post-purchase values on the state grid.

    ``best_at(h, b, x, n)`` is the value, at the end of quarter ``n``, of a customer
    who bought in quarter ``n`` with ``x`` repeat purchases and ``b`` unmailed silent
    quarters behind them, when ``h`` quarters are left to decide; ``hold_at(h, b, x, n)``
    the value of holding for all ``h`` quarters (for a customer alive through ``n``).
    ``log_moment[b, x, n]`` is ``log E[p^x (1-p)^a (1-rho p)^b]`` with ``a = n - x - b``
    (minus infinity off the grid). The tables are laid out with n last, the
    dimension every step of the program shifts along, so its slices are contiguous.
    With h quarters left only a band of n can be reached from the states the
    program was solved for, so ``best[h]`` and ``hold[h]`` hold that band alone,
    starting at ``first_n[h]``.
    """

    beliefs: Beliefs
    margin: float
    piece_cost: float
    discount: float
    horizon: int
    log_moment: np.ndarray
    log_alive: np.ndarray
    best: list[np.ndarray]
    hold: list[np.ndarray]
    first_n: tuple[int, ...]

    @property
    def rho(self) -> float:
        return self.beliefs.rho

    def best_at(self, h: int, b, x, n) -> np.ndarray:
        return self.best[h][b, x, self._column(h, n)]

    def hold_at(self, h: int, b, x, n) -> np.ndarray:
        return self.hold[h][b, x, self._column(h, n)]

    def _column(self, h: int, n) -> np.ndarray:
        """Where quarter n lies in the tables for h quarters left; a state the program cannot reach is an error."""
        column = np.asarray(n) - self.first_n[h]
        if column.size and (column.min() < 0 or column.max() >= self.best[h].shape[2]):
            raise ValueError(f"quarter n outside {self.first_n[h]}..{self.first_n[h] + self.best[h].shape[2] - 1}, "
                             f"the states solved for with {h} quarters left; solve with a wider n_min..n_max")
        return column


def log_moment_grid(beliefs: Beliefs, n_max: int, b_max: int, x_max: int | None = None) -> np.ndarray:
    """``log E[p^x (1-p)^a (1-rho p)^b]`` on the grid ``[b, x, n]`` with ``a = n - x - b``.

    Built by the recursion ``M(x, a, b+1) = M(x, a+1, b) + (1 - rho) M(x+1, a, b)``
    (from ``1 - rho p = (1 - p) + (1 - rho) p``), which has no cancellation, from
    ``M(x, a, 0) = B(alpha + x, beta + a) / B(alpha, beta)``. x runs to ``x_max``
    (default ``n_max + 1``).
    """
    columns = n_max + 2 if x_max is None else min(n_max + 2, x_max + 1)
    size = n_max + b_max + 2
    x = np.arange(size)[:, None]
    a = np.arange(size)[None, :]
    layer = special.betaln(beliefs.alpha + x, beliefs.beta + a) - special.betaln(beliefs.alpha, beliefs.beta)
    log_rest = math.log1p(-beliefs.rho) if beliefs.rho < 1 else -np.inf
    grid = np.full((n_max + 1, columns, b_max + 1), -np.inf)
    n = np.arange(n_max + 1)[:, None]
    xs = np.arange(columns)[None, :]
    for b in range(b_max + 1):
        a_index = n - xs - b
        valid = a_index >= 0
        grid[:, :, b] = np.where(valid, layer[np.minimum(xs, size - 1), np.clip(a_index, 0, size - 1)], -np.inf)
        if b < b_max:
            layer = np.logaddexp(layer[:-1, 1:], log_rest + layer[1:, :-1])
            layer = np.pad(layer, ((0, 1), (0, 1)), constant_values=-np.inf)
    return np.ascontiguousarray(grid.transpose(2, 1, 0))


def _next_quarter(log_moment: np.ndarray, log_alive: np.ndarray, shift_x: int, shift_b: int) -> np.ndarray:
    """``P(alive next quarter | alive through n) * M(state next quarter) / M(state now)`` on the whole grid.

    The next state is ``(n + 1, x + shift_x, b + shift_b)`` (tables are ``[b, x, n]``):
    with ``shift_x = 1`` the chance of a purchase when mailed (times rho when held);
    with both shifts 0 the chance of being alive and silent after a mailed quarter;
    with ``shift_b = 1`` alive and silent after a held quarter.
    """
    depth, columns, rows = log_moment.shape
    here = log_moment[: depth - shift_b, : columns - shift_x, : rows - 1]
    there = log_moment[shift_b:, shift_x:, 1:]
    with np.errstate(invalid="ignore"):
        ratio = np.exp(log_alive[None, None, : rows - 1, 1] + there - here)
    out = np.zeros_like(log_moment)
    out[: depth - shift_b, : columns - shift_x, : rows - 1] = np.where(np.isfinite(here), ratio, 0.0)
    return out


def _times_shifted(table: np.ndarray, factor: np.ndarray, quarters: int, out: np.ndarray) -> np.ndarray:
    """``table`` times ``factor`` read ``quarters`` later along n (zero beyond the grid), into ``out`` (which may be ``table``)."""
    rows = table.shape[2] - quarters
    np.multiply(table[:, :, :rows], factor[:, :, quarters:], out=out[:, :, :rows])
    out[:, :, rows:] = 0.0
    return out


_B_BLOCKS = 4  # blocks of b in the program's inner loop (see solve)


def solve(
    beliefs: Beliefs,
    margin: float,
    piece_cost: float,
    discount: float,
    horizon: int,
    n_max: int,
    b_max: int,
    n_min: int = 0,
    x_max: int | None = None,
) -> Program:
    """Solve the post-purchase values ``best[h]`` and hold-only values ``hold[h]`` for h = 0..horizon-1.

    ``n_min``, ``n_max``, ``x_max`` and ``b_max`` bound the states the caller will
    decide at; the grid reaches ``horizon`` quarters beyond them. With h quarters
    left only the states that can be reached with h left are computed: n from
    ``n_min + horizon - h`` to ``n_max + horizon - h``, x up to ``x_max + horizon - h``
    and b up to ``b_max + horizon - h``. The work is a loop
    over (h, i) pairs, each a few numpy operations over that part of the grid,
    split into blocks of b that two threads share.
    """
    rho = beliefs.rho
    # Held quarters add to b; with rho = 0 nothing is learnt from them but n still grows.
    b_grid = b_max + 1 + (horizon if rho > 0 else 0)
    n_grid = n_max + horizon + 1
    x_top = n_max if x_max is None else x_max
    # x never exceeds the largest x asked about plus one per quarter ahead (and one more for x + 1).
    log_moment = log_moment_grid(beliefs, n_grid + 1, b_grid + 1, x_top + horizon + 3)
    shape = log_moment.shape
    steps = np.arange(horizon + 2)
    ns = np.arange(shape[2])
    # log P(alive through n + i | alive through n) = log B(gamma, delta + n + i) - log B(gamma, delta + n)
    log_alive = special.betaln(beliefs.gamma, beliefs.delta + ns[:, None] + steps[None, :]) - special.betaln(beliefs.gamma, beliefs.delta + ns[:, None])

    def reach(h: int) -> tuple[int, int, int, int]:
        """The states reachable with h quarters left: (first n, last n, last x, last b)."""
        deep = min(b_max + horizon - h + 1, shape[0] - 2) if rho > 0 else shape[0] - 2
        top = n_max + horizon - h
        return max(n_min + horizon - h - 1, 0), top, min(top + 1, x_top + horizon - h + 1), deep

    # Along a mailed silent stretch from any state, the chance of a first purchase in the i-th quarter
    # and of being alive and silent after i quarters do not depend on the horizon: compute them once,
    # discounted, with the part of a plan's value that needs no later table (its margins and costs).
    # One quarter's chances are exponentials; i quarters' are products of them along n.
    buy_next = _next_quarter(log_moment, log_alive, 1, 0)  # alive next quarter and buys, when mailed
    silent_next = _next_quarter(log_moment, log_alive, 0, 0)  # alive next quarter and silent, when mailed
    # These tables are read only at n >= n_min (the first n reachable with at most horizon - 1 quarters left),
    # so they start there: index n - n_min. The i-th is read only with i or more quarters left, so it keeps
    # only the states reachable then. Running tables are updated in place, with no grid-sized temporaries.
    later = (slice(None), slice(None), slice(n_min, None))
    purchase_after, silent_after, known_part = [None], [None], [None]
    no_purchase_yet = np.ones_like(log_moment[later])
    margins_and_costs = np.zeros_like(no_purchase_yet)
    still_silent = np.ones_like(no_purchase_yet)  # alive and silent through i - 1 mailed quarters
    first_purchase = np.empty_like(no_purchase_yet)
    scratch = np.empty_like(no_purchase_yet)
    for i in range(1, horizon + 1):
        _, top, wide, deep = reach(min(i, horizon - 1))
        kept = (slice(0, deep + 1), slice(0, wide + 1), slice(0, top + 1 - n_min))
        _times_shifted(still_silent, buy_next[later], i - 1, first_purchase)
        # margins_and_costs += d^i (margin * first_purchase - piece_cost * no_purchase_yet)
        np.multiply(first_purchase, discount**i * margin, out=scratch)
        margins_and_costs += scratch
        np.multiply(no_purchase_yet, discount**i * piece_cost, out=scratch)
        margins_and_costs -= scratch
        no_purchase_yet -= first_purchase
        purchase_after.append(first_purchase[kept] * discount**i)
        known_part.append(margins_and_costs[kept].copy())
        _times_shifted(still_silent, silent_next[later], i - 1, still_silent)
        if rho > 0:
            silent_after.append(still_silent[kept] * discount**i)
    del no_purchase_yet, margins_and_costs, still_silent, first_purchase, scratch
    if rho > 0:
        held_buy = rho * buy_next
        held_silent = _next_quarter(log_moment, log_alive, 0, 1)
    first_n = [reach(h)[0] for h in range(horizon)]
    band = n_max - n_min + 2  # n from first_n[h] to first_n[h] + band - 1 (the reachable band, the same width for every h)
    best = [np.zeros((shape[0], shape[1], band))]
    hold = [np.zeros((shape[0], shape[1], band))]
    with band_pool() as pool:  # for the blocks of b in each step
        for h in range(1, horizon):
            low, top, wide, deep = reach(h)

            def at(table: np.ndarray, first: int, i: int = 0, shift_x: int = 0, shift_b: int = 0, rows: tuple[int, int, int] | None = None) -> np.ndarray:
                """The states reachable with h left in ``table`` (whose n starts at ``first``), ``i`` quarters on and
                shifted in x and b; ``rows`` = (first b, last b + 1, last x + 1) narrows them to a block of b."""
                b0, b1, x1 = rows or (0, deep + 1, wide + 1)
                return table[b0 + shift_b : b1 + shift_b, shift_x : x1 + shift_x, low + i - first : top + 1 + i - first]

            def earlier(tables: list[np.ndarray], i: int, shift_x: int = 0, shift_b: int = 0, rows=None) -> np.ndarray:
                """``at`` in the solved table for h - i quarters left, i quarters on."""
                return at(tables[h - i], first_n[h - i], i, shift_x, shift_b, rows)

            held = np.zeros((shape[0], shape[1], band))
            if rho > 0:
                # Hold for all h quarters: an unprompted purchase, or silence that adds one to b:
                # held = d * (held_buy * (margin + best[h-1] after the purchase) + held_silent * hold[h-1] one b on).
                part = at(held, low)
                np.add(earlier(best, 1, 1), margin, out=part)
                part *= at(held_buy, 0)
                part += at(held_silent, 0) * earlier(hold, 1, 0, 1)
                part *= discount
            hold.append(held)
            # Mail J quarters, then hold: a plan's value is its known part plus the discounted values
            # after a first purchase in each mailed quarter (from earlier tables) plus the hold tail.
            # A state exists only where x + b <= n <= top, and is reached only where x + b <= x_top + b_max plus one
            # per quarter gone (each quarter adds at most one purchase or one held quarter), one more for the x + 1
            # and b + 1 that later tables read. So a block of b from b0 on needs x only up to the smaller bound less b0:
            # a few blocks skip most of the (b, x) corner where no state lies or none is reached.
            values = np.zeros((shape[0], shape[1], band))
            edges = np.linspace(0, deep + 1, _B_BLOCKS + 1).astype(int)
            reached = x_top + b_max + horizon - h + 1

            def plan_block(rows: tuple[int, int, int]) -> None:
                chosen = at(held, low, rows=rows).copy()
                after_purchases = np.zeros_like(chosen)
                candidate = np.empty_like(chosen)
                tail = np.empty_like(chosen)
                for i in range(1, h + 1):
                    np.multiply(at(purchase_after[i], n_min, rows=rows), earlier(best, i, 1, rows=rows), out=candidate)
                    after_purchases += candidate
                    np.add(after_purchases, at(known_part[i], n_min, rows=rows), out=candidate)
                    if rho > 0 and i < h:
                        np.multiply(at(silent_after[i], n_min, rows=rows), earlier(hold, i, rows=rows), out=tail)
                        candidate += tail
                    np.maximum(chosen, candidate, out=chosen)
                at(values, low, rows=rows)[...] = np.where(np.isfinite(at(log_moment, 0, rows=rows)), chosen, 0.0)

            blocks = [(b0, b1, min(wide, top - b0, reached - b0) + 1) for b0, b1 in zip(edges[:-1], edges[1:])]
            # The blocks write disjoint rows of b: two threads share them (their numpy operations release the GIL).
            list(pool.map(plan_block, [rows for rows in blocks if rows[1] > rows[0] and rows[2] > 0]))
            best.append(values)
    return Program(beliefs, margin, piece_cost, discount, horizon, log_moment, log_alive, best, hold, tuple(first_n))


@dataclass(frozen=True)
class Decisions:
    """Values of the choices at given states (arrays over states, money in currency units).

    ``mail_value`` is the best plan that mails now, ``hold_value`` the best that
    holds now; ``mail`` is True where mailing is at least as good; ``value_of_mailing``
    is their difference.
    """

    mail_value: np.ndarray
    hold_value: np.ndarray

    @property
    def mail(self) -> np.ndarray:
        return self.mail_value >= self.hold_value

    @property
    def value_of_mailing(self) -> np.ndarray:
        return self.mail_value - self.hold_value

    @property
    def value(self) -> np.ndarray:
        return np.maximum(self.mail_value, self.hold_value)


def _plan_values(program: Program, n: np.ndarray, x: np.ndarray, b: np.ndarray, alive: np.ndarray, total: np.ndarray, horizon: int):
    """Values of "mail J quarters, then hold" for J = 0..horizon from states with given alive and total weights.

    ``alive`` is the chance of being alive through quarter n and ``total`` the
    chance of the path so far: rewards are earned on ``alive``, piece costs paid on
    ``total`` less the purchases. A plan's value is therefore
    ``alive * per_alive[J] - total * costs[J]``, where ``per_alive`` depends only on
    (n, x, b): it is computed once per distinct state. Returns (states, horizon + 1).
    """
    n, x, b = (np.asarray(v, dtype=np.int64) for v in (n, x, b))
    keys = (b * program.log_moment.shape[1] + x) * program.log_moment.shape[2] + n
    distinct, first, inverse = np.unique(keys, return_index=True, return_inverse=True)
    per_alive = _plan_values_per_alive(program, n[first], x[first], b[first], horizon)
    costs = program.piece_cost * np.concatenate([[0.0], np.cumsum(program.discount ** np.arange(1, horizon + 1))])
    return np.asarray(alive)[:, None] * per_alive[inverse.ravel()] - np.asarray(total)[:, None] * costs[None, :]


def _plan_values_per_alive(program: Program, n: np.ndarray, x: np.ndarray, b: np.ndarray, horizon: int) -> np.ndarray:
    """For a customer alive through n in state (n, x, b): plan values without the piece costs a dead customer would
    also pay (those are ``total * costs[J]``), i.e. margins, later values, and the costs saved by purchases."""
    d, margin, cost = program.discount, program.margin, program.piece_cost
    here = program.log_moment[b, x, n]
    values = np.empty((len(n), horizon + 1))
    values[:, 0] = program.hold_at(horizon, b, x, n) if horizon < len(program.hold) else _hold_value(program, n, x, b, horizon)
    plan = np.zeros(len(n))
    purchased = np.zeros(len(n))  # chance of a purchase so far in the stretch (no piece is paid after it)
    for i in range(1, horizon + 1):
        first_purchase = np.exp(program.log_alive[n, i] + program.log_moment[b, x + 1, n + i] - here)
        after = program.best_at(horizon - i, b, x + 1, n + i) if horizon - i < len(program.best) else 0.0
        plan += d**i * (first_purchase * (margin + after) + cost * purchased)
        purchased += first_purchase
        if i < horizon:
            silent_alive = np.exp(program.log_alive[n, i] + program.log_moment[b, x, n + i] - here)
            values[:, i] = plan + d**i * silent_alive * program.hold_at(horizon - i, b, x, n + i)
        else:
            values[:, i] = plan
    return values


def _hold_value(program: Program, n, x, b, horizon):
    """Value of holding for ``horizon`` quarters for a customer alive through n (one more step than the tables hold)."""
    if program.rho == 0:
        return np.zeros(len(n))
    d, rho = program.discount, program.rho
    here = program.log_moment[b, x, n]
    buy = rho * np.exp(program.log_alive[n, 1] + program.log_moment[b, x + 1, n + 1] - here)
    silent = np.exp(program.log_alive[n, 1] + program.log_moment[b + 1, x, n + 1] - here)
    return d * (buy * (program.margin + program.best_at(horizon - 1, b, x + 1, n + 1)) + silent * program.hold_at(horizon - 1, b + 1, x, n + 1))


def decide(program: Program, n: np.ndarray, x: np.ndarray, b: np.ndarray, alive: np.ndarray) -> Decisions:
    """Mail or hold, looking ``program.horizon`` quarters ahead, for silent customers in states (n, x, b).

    ``alive`` is the posterior chance of being alive through quarter n. Mailing now
    is compared with the best plan that holds this quarter and then mails J quarters.
    """
    n, x, b = (np.asarray(v, dtype=np.int64) for v in (n, x, b))
    alive = np.asarray(alive, dtype=float)
    mail_plans = _plan_values(program, n, x, b, alive, np.ones_like(alive), program.horizon)
    return Decisions(mail_plans[:, 1:].max(axis=1), hold_value(program, n, x, b, alive))


def hold_value(program: Program, n: np.ndarray, x: np.ndarray, b: np.ndarray, alive: np.ndarray) -> np.ndarray:
    """Value of holding this quarter (an unprompted purchase, rho p, or silence), then the best "mail J, then hold"."""
    n, x, b = (np.asarray(v, dtype=np.int64) for v in (n, x, b))
    alive = np.asarray(alive, dtype=float)
    horizon = program.horizon
    if horizon == 1:
        return alive * _hold_value(program, n, x, b, 1)
    d, rho = program.discount, program.rho
    here = program.log_moment[b, x, n]
    silent_alive = alive * np.exp(program.log_alive[n, 1] + program.log_moment[b + 1, x, n + 1] - here)
    if rho == 0:
        return d * _plan_values(program, n + 1, x, b + 1, silent_alive, np.ones_like(alive), horizon - 1).max(axis=1)
    buy = alive * rho * np.exp(program.log_alive[n, 1] + program.log_moment[b, x + 1, n + 1] - here)
    later = _plan_values(program, n + 1, x, b + 1, silent_alive, 1.0 - buy, horizon - 1).max(axis=1)
    return d * buy * (program.margin + program.best_at(horizon - 1, b, x + 1, n + 1)) + d * later


def decide_at(program: Program, n, x, b, alive, horizon: int) -> Decisions:
    """``decide`` with a shorter horizon than the program was solved for (the finite-horizon policy's last quarters)."""
    if horizon == program.horizon:
        return decide(program, n, x, b, alive)
    return decide(dataclasses.replace(program, horizon=horizon), n, x, b, alive)


# ---------------------------------------------------------------- order values and spend bands


@dataclass(frozen=True)
class SpendBand:
    """A band of expected order values (currency units) and the value the program uses for it."""

    label: str
    low: float
    high: float
    order_value: float


def spend_bands(model, economics: Economics, count: int) -> tuple[SpendBand, ...]:
    """The order values the program is solved for.

    With ``order_value`` in the policy there is one band at that value. Otherwise
    the fitted gamma-gamma population of mean order values is cut into ``count``
    bands of equal share, each represented by its median (its share's midpoint
    quantile). A customer is put in the band of their own expected order value.
    """
    if economics.order_value is not None:
        return (SpendBand("all", 0.0, math.inf, economics.order_value),)
    spend = getattr(model, "spend", None)
    if spend is None or not (spend.q > 1):
        raise InputError("the model has no usable order-value model; set order_value in the policy's [economics] or pass --order-value")
    # Mean order value = p / nu with nu ~ Gamma(q, rate gamma): its u-quantile is p / (the (1-u)-quantile of nu),
    # and that quantile is gammainccinv(q, u) / gamma (the inverse of the upper regularized incomplete gamma).
    def quantile(u: float) -> float:
        if u <= 0:
            return 0.0
        if u >= 1:
            return math.inf
        return spend.p * spend.gamma / float(special.gammainccinv(spend.q, u))

    bands = []
    names = {1: ["all"], 2: ["lower", "upper"], 3: ["low", "middle", "high"]}.get(count, [f"band {i + 1}" for i in range(count)])
    for i in range(count):
        low, high = quantile(i / count), quantile((i + 1) / count)
        middle = quantile((i + 0.5) / count)
        bands.append(SpendBand(names[i], low, high, middle))
    return tuple(bands)


def typical_order_value(model, economics: Economics) -> float:
    """The policy's fixed order value, or the spend model's population mean."""
    if economics.order_value is not None:
        return economics.order_value
    spend = getattr(model, "spend", None)
    if spend is None or not (spend.q > 1):
        raise InputError("the model has no usable order-value model; set order_value in the policy's [economics] or pass --order-value")
    return float(spend.population_mean)


def band_pool() -> ThreadPoolExecutor:
    """Two worker threads (one on a single core) for the spend bands' programs, and for the blocks inside one.

    The bands' programs are independent and their work is numpy operations that
    release the GIL, so two threads keep both cores of a laptop busy.
    """
    return ThreadPoolExecutor(max_workers=min(2, os.cpu_count() or 1))


def each_band(function, bands):
    """``[function(band) for band in bands]``, two bands at a time (see :func:`band_pool`)."""
    with band_pool() as pool:
        return list(pool.map(function, bands))


def band_index(bands: tuple[SpendBand, ...], order_values: np.ndarray) -> np.ndarray:
    """Which band each expected order value falls in."""
    edges = np.array([band.low for band in bands[1:]])
    return np.searchsorted(edges, np.nan_to_num(order_values, nan=bands[0].order_value), side="right")


# ---------------------------------------------------------------- the stop table


@dataclass(frozen=True)
class StopTable:
    """When to stop mailing, for every (x, t_x) with t_x up to the horizon, per spend band.

    ``rows`` is a DataFrame with columns spend_band, order_value, frequency (x),
    last_purchase_quarter (t_x), stop_after (silent quarters at which the customer is
    first not mailed; -1 when mailed throughout), breakeven_stop_after (the same for the
    one-period breakeven rule), and ``cells`` a DataFrame with spend_band, frequency,
    last_purchase_quarter, silent_quarters, p_buy, mail, value_of_mailing for every
    state up to ``horizon`` silent quarters.
    """

    economics: Economics
    beliefs: Beliefs
    bands: tuple[SpendBand, ...]
    rows: "object"
    cells: "object"


def all_states(horizon: int) -> tuple[np.ndarray, np.ndarray]:
    """Every (x, t_x) with t_x up to the horizon: (0, 0) and 1 <= x <= t_x <= horizon."""
    pairs = [(0, 0)] + [(x, t) for t in range(1, horizon + 1) for x in range(1, t + 1)]
    pairs.sort()
    x, t = np.array(pairs).T
    return x, t


def build_stop_table(model, economics: Economics, band_count: int = 3) -> StopTable:
    """Solve the program for each spend band and read off the stop point of every (x, t_x)."""
    import pandas as pd

    from lapsewise.churn import mailed_silent_histories, posterior

    beliefs = Beliefs.from_fit(model.churn, economics.unmailed_response)
    horizon = economics.horizon_quarters
    bands = spend_bands(model, economics, band_count)
    x_rows, t_rows = all_states(horizon)
    silent = np.arange(horizon + 1)
    x = np.repeat(x_rows, len(silent))
    t_x = np.repeat(t_rows, len(silent))
    k = np.tile(silent, len(x_rows))
    histories = mailed_silent_histories(x, t_x, k)
    post = posterior(beliefs.churn_fit(), histories)
    alive, p_buy = post.alive_now[histories.inverse], post.p_buy[histories.inverse]

    def band_decisions(band: SpendBand) -> Decisions:
        program = solve(beliefs, economics.margin(band.order_value), economics.piece_cost, economics.discount, horizon, n_max=2 * horizon, b_max=0, n_min=0, x_max=horizon)
        return decide(program, t_x + k, x, np.zeros_like(x), alive)

    row_frames, cell_frames = [], []
    for band, decisions in zip(bands, each_band(band_decisions, bands)):
        margin = economics.margin(band.order_value)
        mail = decisions.mail.reshape(len(x_rows), len(silent))
        breakeven = (p_buy * margin >= economics.piece_cost).reshape(len(x_rows), len(silent))
        row_frames.append(
            pd.DataFrame(
                {
                    "spend_band": band.label,
                    "order_value": band.order_value,
                    "frequency": x_rows,
                    "last_purchase_quarter": t_rows,
                    "stop_after": _first_false(mail),
                    "breakeven_stop_after": _first_false(breakeven),
                }
            )
        )
        cell_frames.append(
            pd.DataFrame(
                {
                    "spend_band": band.label,
                    "frequency": x,
                    "last_purchase_quarter": t_x,
                    "silent_quarters": k,
                    "p_alive": alive,
                    "p_buy": p_buy,
                    "mail": decisions.mail,
                    "value_of_mailing": decisions.value_of_mailing,
                }
            )
        )
    return StopTable(economics, beliefs, bands, pd.concat(row_frames, ignore_index=True), pd.concat(cell_frames, ignore_index=True))


def _first_false(flags: np.ndarray) -> np.ndarray:
    """Per row, the index of the first False (-1 when every entry is True)."""
    stopped = ~flags
    return np.where(stopped.any(axis=1), stopped.argmax(axis=1), -1)


# ---------------------------------------------------------------- versions: the value of this quarter's piece


def mail_value_with(program: Program, n, x, b, alive, response: float, piece_cost: float) -> np.ndarray:
    """Value of mailing a version of the piece this quarter, then following the program's policy.

    A version's piece costs ``piece_cost`` and turns the purchase chance p into
    ``response * p``. Silence after such a piece multiplies the belief by
    ``1 - response p``, which is the mix ``lam (1 - p) + (1 - lam)(1 - rho p)``
    of a mailed and a held silent quarter with ``lam = (response - rho) / (1 - rho)``.
    The value of every later plan is linear in the belief, so the best plan after
    silence is found on the sum of the two parts' plan values: exact, with no
    new state. With ``response = 1`` and the program's piece cost this equals
    ``decide(...).mail_value``.
    """
    n, x, b = (np.asarray(v, dtype=np.int64) for v in (n, x, b))
    alive = np.asarray(alive, dtype=float)
    rho, d, margin = program.rho, program.discount, program.margin
    if rho >= 1.0 and response != 1.0:
        raise InputError("with unmailed_response 1 a held customer responds like a mailed one, so versions with response below 1 cannot be valued")
    mix = 1.0 if rho >= 1.0 else (response - rho) / (1.0 - rho)
    here = program.log_moment[b, x, n]
    survive = np.exp(program.log_alive[n, 1])
    buy = alive * survive * response * np.exp(program.log_moment[b, x + 1, n + 1] - here)
    horizon = program.horizon
    after_purchase = program.best_at(horizon - 1, b, x + 1, n + 1) if horizon > 1 else 0.0
    value = d * (buy * (margin + after_purchase) - piece_cost)
    if horizon == 1:
        return value
    mailed_part = alive * survive * mix * np.exp(program.log_moment[b, x, n + 1] - here)
    held_part = alive * survive * (1.0 - mix) * np.exp(program.log_moment[b + 1, x, n + 1] - here)
    plans = _plan_values(program, n + 1, x, b, mailed_part, 1.0 - buy, horizon - 1)
    if mix != 1.0:
        plans = plans + _plan_values(program, n + 1, x, b + 1, held_part, np.zeros_like(alive), horizon - 1)
    return value + d * plans.max(axis=1)

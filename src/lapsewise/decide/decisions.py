"""Decisions at silent states: mail or hold this quarter, and what each version of the piece is worth.

A silent customer in state ``(n, x, b)`` (see :mod:`lapsewise.decide.program`) is
alive through quarter n with probability ``pi`` (the posterior's ``alive_now``).
The firm sees only silence until the next purchase, so what it can do from here
is a plan for the silent stretch; its value is linear in the belief. A plan
"mail J quarters, then hold" from a state with alive weight ``pi`` and path
weight ``T`` (the chance of the path so far, dead or alive) is worth::

    pi * A_J(n, x, b) - T * c * sum_{i=1..J} d^i

where ``A_J`` (the :func:`stretch_plan_values` per unit alive) holds the margins,
the values after a purchase (``W`` of the program) and the pieces a purchase
saves; a dead customer still receives the pieces. Each decision looks
``horizon`` quarters ahead from its own state (a rolling horizon) and compares
the best plan that mails now (J >= 1) with the best that holds now: an
unprompted purchase (chance ``pi g``) or silence, after which the best plan
starts one quarter later from ``(n + 1, x, b + 1)``.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np

from lapsewise.data.codes import integer_codes
from lapsewise.decide.program import Program
from lapsewise.errors import InputError


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


SIDES = ("chord", "below", "above", "bracket")
OUTER = ("slopes", "margins")


@dataclass(frozen=True)
class Between:
    """The program read at each row's own margin, from programs solved at margins around it.

    Every value the program gives is, state by state, the best of a finite set of
    plans, and each plan's value is linear in the margin m (its orders times m, less
    its pieces). As a function of m every value is therefore convex and piecewise
    linear. ``programs[1]`` and ``programs[2]`` are solved at margins ``m1 < m2`` and
    ``margin`` holds each row's own margin, in ``[m1, m2]``. For a row at margin m
    a reading of any table is:

    * ``side="chord"``: the chord through the readings at m1 and m2. It lies above
      the value and equals it at m1 and m2; this is the estimate.
    * ``side="below"``: the larger of two lines that lie below a convex function,
      extended to m. With ``outer="slopes"``, ``programs[0]`` and ``programs[3]``
      are the slope programs at m1 and m2 (:meth:`~lapsewise.decide.program.Program.slopes`:
      the chosen plans' discounted orders, a subgradient) and the lines are the
      tangents there. With ``outer="margins"`` they are the programs solved at the
      next margins out, ``m0 < m1`` and ``m3 > m2``, and the lines are the secants
      through (m0, m1) and (m2, m3): a secant of a convex function lies below it
      outside its own interval. A missing outer program leaves its line out (the
      chord where neither exists).
    * ``side="above"``: the chord again.
    * ``side="bracket"``: both bounds at once, stacked on a new first axis
      (above, below), so that the decisions read each table once.

    The decisions add readings with nonnegative weights (chances of being alive),
    except a version whose response is below rho, which gives a belief part a
    negative weight. For such rows (``negative``) the two bounds swap their
    readings. Any sum of readings and its best over plans then lies between its
    ``below`` and ``above`` evaluations, with the ``chord`` evaluation inside.
    The rows stay in the order the decisions ask about them: every array read for
    them lines up with ``margin``.
    """

    programs: tuple
    margin: np.ndarray
    side: str = "chord"
    outer: str = "slopes"

    def __post_init__(self) -> None:
        if self.side not in SIDES or self.outer not in OUTER:
            raise ValueError(f"side must be one of {SIDES} and outer one of {OUTER}")

    def __getattr__(self, name: str):
        # The margin-free parts (discount, piece cost, rho, horizon, the chance grids) are the same in every program.
        if name in ("discount", "piece_cost", "rho", "horizon", "log_moment", "log_alive", "process"):
            return getattr(self.programs[1], name)
        raise AttributeError(name)

    def order_weight(self, elapsed: int) -> np.ndarray:
        """Each row's own margin: every order counts the same, whenever it comes."""
        return self.margin

    def after_purchase_at(self, h: int, b, x, n) -> np.ndarray:
        return self.combine([node.after_purchase_at(h, b, x, n) if node is not None else None for node in self.programs])

    def hold_throughout_at(self, h: int, b, x, n) -> np.ndarray:
        return self.combine([node.hold_throughout_at(h, b, x, n) if node is not None else None for node in self.programs])

    def combine(self, readings: list, block: slice = slice(None), negative: np.ndarray | None = None) -> np.ndarray:
        """The rows' readings at their own margins from the readings in each program (rows first, as ``margin[block]``;
        with ``side="bracket"`` a first axis of two more)."""
        low, high = self.programs[1], self.programs[2]
        margin = self.margin[block]
        first, second = readings[1], readings[2]
        shape = (len(margin),) + (1,) * (np.ndim(first) - 1)
        step = (margin - low.margin).reshape(shape)
        chord = first + (second - first) * (step / (high.margin - low.margin))
        if negative is not None and not np.any(negative):
            negative = None
        if self.side == "chord" or (self.side == "above" and negative is None):
            return chord
        lines = []
        beyond = (margin - high.margin).reshape(shape)
        if self.outer == "slopes":
            if readings[0] is not None:
                lines.append(first + readings[0] * step)
            if readings[3] is not None:
                lines.append(second + readings[3] * beyond)
        else:
            if readings[0] is not None:
                lines.append(first + (first - readings[0]) * (step / (low.margin - self.programs[0].margin)))
            if readings[3] is not None:
                lines.append(second + (readings[3] - second) * (beyond / (self.programs[3].margin - high.margin)))
        envelope = np.minimum(np.maximum.reduce(lines), chord) if lines else chord
        if negative is None:
            above, below = chord, envelope
        else:
            swapped = np.asarray(negative).reshape(shape)
            above, below = np.where(swapped, envelope, chord), np.where(swapped, chord, envelope)
        if self.side == "bracket":
            return np.stack([above, below])
        return above if self.side == "above" else below


def _states(n, x, b) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    return tuple(np.asarray(v, dtype=np.int64) for v in (n, x, b))


def stretch_plan_values(program: Program, n, x, b, alive, total, horizon: int) -> np.ndarray:
    """Values of "mail J quarters, then hold" for J = 0..horizon from silent states, shape (states, horizon + 1).

    ``alive`` is the chance of being alive through quarter n and ``total`` the
    chance of the path so far: rewards are earned on ``alive``, piece costs paid on
    ``total`` less the purchases. A plan's value is ``alive * A_J - total * costs_J``;
    ``A_J`` depends only on (n, x, b), so it is computed once per distinct state.
    """
    per_alive, inverse, costs = _stretch_parts(program, n, x, b, horizon)
    return np.asarray(alive)[:, None] * per_alive[inverse] - np.asarray(total)[:, None] * costs[None, :]


def _stretch_parts(program: Program, n, x, b, horizon: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``A_J`` per distinct state, each state's row in it, and ``costs_J`` (:func:`stretch_plan_values`)."""
    n, x, b = _states(n, x, b)
    depth, columns, rows = program.log_moment.shape
    distinct, inverse = integer_codes((b * columns + x) * rows + n, depth * columns * rows)
    # The distinct keys decode to their states: no sort, no first index.
    per_alive = _plan_values_per_alive(program, distinct % rows, distinct // rows % columns, distinct // (rows * columns), horizon)
    return per_alive, inverse, _plan_costs(program, horizon)


BEST_PLAN_ROWS = 8192
"""Rows per block in :func:`best_plan`: a block's states x plans arrays stay in the processor's cache."""


def best_plan(program, horizon: int, *parts, first: int = 0, choice: bool = False):
    """The best plan's value, ``max over J >= first`` of the sum over ``parts`` of :func:`stretch_plan_values`.

    Each part is ``(n, x, b, alive, total)`` for the same silent customers. The same
    numbers as summing the parts' ``stretch_plan_values`` and taking the maximum
    (the tests compare them), in blocks of rows so that no states x plans array is
    built for all the states at once. ``program`` is a :class:`~lapsewise.decide.program.Program`
    or a :class:`Between` (each row at its own margin). With ``choice`` (a Program only) it returns the best J too.
    """
    prepared = [(_plan_reader(program, n, x, b, horizon), np.asarray(alive, dtype=float), np.asarray(total, dtype=float)) for n, x, b, alive, total in parts]
    rows = len(prepared[0][1])
    costs = _plan_costs(program, horizon)[first:]
    out = None
    chosen = np.zeros(rows, dtype=np.int64) if choice else None
    for start in range(0, rows, BEST_PLAN_ROWS):
        block = slice(start, start + BEST_PLAN_ROWS)
        summed = None
        for read, alive, total in prepared:
            value = alive[block, None] * read(block, alive[block] < 0)[..., first:] - total[block, None] * costs[None, :]
            summed = value if summed is None else summed + value
        if out is None:  # a Between's bracket adds a first axis
            out = np.empty(summed.shape[:-2] + (rows,))
        out[..., block] = summed.max(axis=-1)
        if choice:
            chosen[block] = summed.argmax(axis=-1) + first
    out = out if out is not None else np.empty(0)
    return (out, chosen) if choice else out


def _plan_costs(program, horizon: int) -> np.ndarray:
    """``costs_J``: the pieces of "mail J quarters, then hold" paid whether the customer is alive or not, J = 0..horizon."""
    return program.piece_cost * np.concatenate([[0.0], np.cumsum(program.discount ** np.arange(1, horizon + 1))])


def _plan_reader(program, n, x, b, horizon: int):
    """A function of (block of rows, rows whose weight is negative) giving those rows' ``A_J`` (J = 0..horizon).

    ``A_J`` is computed once per distinct state; a :class:`Between` computes it in each of its programs and combines
    the rows' readings at their own margins.
    """
    if isinstance(program, Between):
        readers = [_plan_reader(node, n, x, b, horizon) if node is not None else None for node in program.programs]
        return lambda block, negative: program.combine([read(block, negative) if read else None for read in readers], block, negative)
    per_alive, inverse, _ = _stretch_parts(program, n, x, b, horizon)
    return lambda block, negative: per_alive[inverse[block]]


def _plan_values_per_alive(program: Program, n: np.ndarray, x: np.ndarray, b: np.ndarray, horizon: int) -> np.ndarray:
    """``A_J`` for J = 0..horizon at states (n, x, b): each plan's margins, values after a purchase and the pieces
    a purchase saves, for a customer alive through n (the pieces a dead customer also gets are ``costs_J``)."""
    d, cost = program.discount, program.piece_cost
    start = program.horizon - horizon  # quarters from the program's decision to this plan's start
    here = program.log_moment[b, x, n]
    values = np.empty((len(n), horizon + 1))
    values[:, 0] = program.hold_throughout_at(horizon, b, x, n) if horizon < len(program.hold_throughout) else _hold_throughout(program, n, x, b, horizon)
    plan = np.zeros(len(n))
    purchased = np.zeros(len(n))  # chance of a purchase so far in the stretch (no piece is paid after it)
    for i in range(1, horizon + 1):
        first_purchase = np.exp(program.log_alive[n, i] + program.log_moment[b, x + 1, n + i] - here)  # f_i
        after = program.after_purchase_at(horizon - i, b, x + 1, n + i) if horizon - i < len(program.after_purchase) else 0.0
        plan += d**i * (first_purchase * (program.order_weight(start + i) + after) + cost * purchased)
        purchased += first_purchase
        if i < horizon:
            silent_alive = np.exp(program.log_alive[n, i] + program.log_moment[b, x, n + i] - here)  # s_i
            values[:, i] = plan + d**i * silent_alive * program.hold_throughout_at(horizon - i, b, x, n + i)
        else:
            values[:, i] = plan
    return values


def _hold_throughout(program: Program, n, x, b, horizon: int) -> np.ndarray:
    """``H_horizon(n, x, b)``: one step of the recursion past the tables the program keeps (they stop at horizon - 1)."""
    if program.rho == 0:
        return np.zeros(len(n))
    d, rho = program.discount, program.rho
    here = program.log_moment[b, x, n]
    buy = rho * np.exp(program.log_alive[n, 1] + program.log_moment[b, x + 1, n + 1] - here)
    silent = np.exp(program.log_alive[n, 1] + program.log_moment[b + 1, x, n + 1] - here)
    after = program.after_purchase_at(horizon - 1, b, x + 1, n + 1)
    margin = program.order_weight(program.horizon - horizon + 1)
    return d * (buy * (margin + after) + silent * program.hold_throughout_at(horizon - 1, b + 1, x, n + 1))


def decide(program: Program, n, x, b, alive) -> Decisions:
    """Mail or hold, looking ``program.horizon`` quarters ahead, for silent customers in states (n, x, b).

    ``alive`` is the posterior chance of being alive through quarter n. Mailing now
    is compared with the best plan that holds this quarter and then mails J quarters.
    """
    n, x, b = _states(n, x, b)
    alive = np.asarray(alive, dtype=float)
    mail_value = best_plan(program, program.horizon, (n, x, b, alive, np.ones_like(alive)), first=1)
    return Decisions(mail_value, hold_now_value(program, n, x, b, alive))


def hold_now_value(program: Program, n, x, b, alive) -> np.ndarray:
    """Value of holding this quarter (an unprompted purchase, chance ``alive * g``, or silence), then the best plan."""
    return _hold_now(program, n, x, b, alive)[0]


def _hold_now(program, n, x, b, alive, weighted: Program | None = None) -> tuple[np.ndarray, np.ndarray | None]:
    """:func:`hold_now_value`, and with ``weighted`` the weighted orders of the plan it chose (see :func:`planned_orders`)."""
    n, x, b = _states(n, x, b)
    alive = np.asarray(alive, dtype=float)
    horizon = program.horizon
    if horizon == 1:
        return alive * _hold_throughout(program, n, x, b, 1), (alive * _hold_throughout(weighted, n, x, b, 1) if weighted else None)
    d, rho = program.discount, program.rho
    here = program.log_moment[b, x, n]
    silent_alive = alive * np.exp(program.log_alive[n, 1] + program.log_moment[b + 1, x, n + 1] - here)
    buy = alive * rho * np.exp(program.log_alive[n, 1] + program.log_moment[b, x + 1, n + 1] - here) if rho > 0 else np.zeros_like(alive)
    later = best_plan(program, horizon - 1, (n + 1, x, b + 1, silent_alive, 1.0 - buy), choice=weighted is not None)
    orders = None
    if weighted is not None:
        later, plan = later
        orders = d * buy * (weighted.order_weight(1) + weighted.after_purchase_at(horizon - 1, b, x + 1, n + 1))
        orders = orders + d * silent_alive * _chosen_plan(weighted, n + 1, x, b + 1, horizon - 1, plan)
    if rho == 0:
        return d * later, orders
    return d * buy * (program.order_weight(1) + program.after_purchase_at(horizon - 1, b, x + 1, n + 1)) + d * later, orders


def planned_orders(program: Program, weighted: Program, n, x, b, alive) -> np.ndarray:
    """The weighted orders of the program's own plan from silent states (n, x, b), per state.

    The plan is the one :func:`decide` makes: mail this quarter or hold, whichever
    is worth more, then the plan that choice came with ("mail J quarters, then
    hold" from now, or from next quarter after holding), and after an order the
    program's plan from the new state. ``weighted`` is the program's
    :meth:`~lapsewise.decide.program.Program.slopes` when solved with
    ``order_weights``: an order e quarters on counts ``d^e u_e``. So with
    ``u_e = w_e / d^e`` the result is the expected orders weighted by ``w_e``: the
    expected orders in the next T quarters with ``w_e = 1`` for e <= T, a DERT at
    another rate with ``w_e`` its discount factors.
    """
    n, x, b = _states(n, x, b)
    alive = np.asarray(alive, dtype=float)
    mail_value, plan = best_plan(program, program.horizon, (n, x, b, alive, np.ones_like(alive)), first=1, choice=True)
    mail_orders = alive * _chosen_plan(weighted, n, x, b, program.horizon, plan)
    hold_value, hold_orders = _hold_now(program, n, x, b, alive, weighted)
    return np.where(mail_value >= hold_value, mail_orders, hold_orders)


def _chosen_plan(weighted: Program, n, x, b, horizon: int, plan: np.ndarray) -> np.ndarray:
    """Per state, ``A_J`` of the weighted program for its chosen J (weighted orders per unit alive; no pieces)."""
    per_alive, inverse, _ = _stretch_parts(weighted, n, x, b, horizon)
    return per_alive[inverse, plan]


def decide_within(program: Program, n, x, b, alive, horizon: int) -> Decisions:
    """``decide`` looking only ``horizon`` quarters ahead (at most the program's): a finite window's last quarters."""
    if horizon == program.horizon:
        return decide(program, n, x, b, alive)
    return decide(dataclasses.replace(program, horizon=horizon), n, x, b, alive)


def version_mail_value(program: Program, n, x, b, alive, response: float, piece_cost: float) -> np.ndarray:
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
    n, x, b = _states(n, x, b)
    alive = np.asarray(alive, dtype=float)
    rho, d, margin = program.rho, program.discount, program.order_weight(1)
    if rho >= 1.0 and response != 1.0:
        raise InputError("with unmailed_response 1 a held customer responds like a mailed one, so versions with response below 1 cannot be valued")
    mix = 1.0 if rho >= 1.0 else (response - rho) / (1.0 - rho)
    here = program.log_moment[b, x, n]
    survive = np.exp(program.log_alive[n, 1])
    buy = alive * survive * response * np.exp(program.log_moment[b, x + 1, n + 1] - here)
    horizon = program.horizon
    after_purchase = program.after_purchase_at(horizon - 1, b, x + 1, n + 1) if horizon > 1 else 0.0
    value = d * (buy * (margin + after_purchase) - piece_cost)
    if horizon == 1:
        return value
    mailed_part = alive * survive * mix * np.exp(program.log_moment[b, x, n + 1] - here)
    held_part = alive * survive * (1.0 - mix) * np.exp(program.log_moment[b + 1, x, n + 1] - here)
    parts = [(n + 1, x, b, mailed_part, 1.0 - buy)]
    if mix != 1.0:
        parts.append((n + 1, x, b + 1, held_part, np.zeros_like(alive)))
    return value + d * best_plan(program, horizon - 1, *parts)

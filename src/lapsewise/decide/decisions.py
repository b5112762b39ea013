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
    keys = (b * program.log_moment.shape[1] + x) * program.log_moment.shape[2] + n
    _, first, inverse = np.unique(keys, return_index=True, return_inverse=True)
    per_alive = _plan_values_per_alive(program, n[first], x[first], b[first], horizon)
    costs = program.piece_cost * np.concatenate([[0.0], np.cumsum(program.discount ** np.arange(1, horizon + 1))])
    return per_alive, inverse.ravel(), costs


BEST_PLAN_ROWS = 8192
"""Rows per block in :func:`best_plan`: a block's states x plans arrays stay in the processor's cache."""


def best_plan(program: Program, horizon: int, *parts, first: int = 0) -> np.ndarray:
    """The best plan's value, ``max over J >= first`` of the sum over ``parts`` of :func:`stretch_plan_values`.

    Each part is ``(n, x, b, alive, total)`` for the same silent customers. The same
    numbers as summing the parts' ``stretch_plan_values`` and taking the maximum
    (the tests compare them), in blocks of rows so that no states x plans array is
    built for all the states at once.
    """
    prepared = [(_stretch_parts(program, n, x, b, horizon), np.asarray(alive, dtype=float), np.asarray(total, dtype=float)) for n, x, b, alive, total in parts]
    rows = len(prepared[0][1])
    out = np.empty(rows)
    for start in range(0, rows, BEST_PLAN_ROWS):
        block = slice(start, start + BEST_PLAN_ROWS)
        summed = None
        for (per_alive, inverse, costs), alive, total in prepared:
            value = alive[block, None] * per_alive[inverse[block], first:] - total[block, None] * costs[None, first:]
            summed = value if summed is None else summed + value
        out[block] = summed.max(axis=1)
    return out


def _plan_values_per_alive(program: Program, n: np.ndarray, x: np.ndarray, b: np.ndarray, horizon: int) -> np.ndarray:
    """``A_J`` for J = 0..horizon at states (n, x, b): each plan's margins, values after a purchase and the pieces
    a purchase saves, for a customer alive through n (the pieces a dead customer also gets are ``costs_J``)."""
    d, margin, cost = program.discount, program.margin, program.piece_cost
    here = program.log_moment[b, x, n]
    values = np.empty((len(n), horizon + 1))
    values[:, 0] = program.hold_throughout_at(horizon, b, x, n) if horizon < len(program.hold_throughout) else _hold_throughout(program, n, x, b, horizon)
    plan = np.zeros(len(n))
    purchased = np.zeros(len(n))  # chance of a purchase so far in the stretch (no piece is paid after it)
    for i in range(1, horizon + 1):
        first_purchase = np.exp(program.log_alive[n, i] + program.log_moment[b, x + 1, n + i] - here)  # f_i
        after = program.after_purchase_at(horizon - i, b, x + 1, n + i) if horizon - i < len(program.after_purchase) else 0.0
        plan += d**i * (first_purchase * (margin + after) + cost * purchased)
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
    return d * (buy * (program.margin + after) + silent * program.hold_throughout_at(horizon - 1, b + 1, x, n + 1))


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
    n, x, b = _states(n, x, b)
    alive = np.asarray(alive, dtype=float)
    horizon = program.horizon
    if horizon == 1:
        return alive * _hold_throughout(program, n, x, b, 1)
    d, rho = program.discount, program.rho
    here = program.log_moment[b, x, n]
    silent_alive = alive * np.exp(program.log_alive[n, 1] + program.log_moment[b + 1, x, n + 1] - here)
    if rho == 0:
        return d * best_plan(program, horizon - 1, (n + 1, x, b + 1, silent_alive, np.ones_like(alive)))
    buy = alive * rho * np.exp(program.log_alive[n, 1] + program.log_moment[b, x + 1, n + 1] - here)
    later = best_plan(program, horizon - 1, (n + 1, x, b + 1, silent_alive, 1.0 - buy))
    return d * buy * (program.margin + program.after_purchase_at(horizon - 1, b, x + 1, n + 1)) + d * later


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
    rho, d, margin = program.rho, program.discount, program.margin
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

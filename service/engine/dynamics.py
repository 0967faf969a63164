"""Settling: run the network dynamics from a batch of cues to a fixed point, a cycle or the limit.

Cues are an ``(n_cues, n_units)`` matrix with values in {-1, 0, +1}; 0 marks a unit the caller
does not know. Three choices shape a run:

* ``mode="sync"`` updates every unit of every active cue at once, as one float32 matrix
  product for the whole batch; cues that reach a fixed point leave the active batch. With
  symmetric weights the only attractors of this map are fixed points and 2-cycles
  (Goles-Chacc, Fogelman-Soulié & Pellegrin 1985); a 2-cycle is detected and stopped.
* ``mode="async"`` updates one unit at a time in a seeded random order, keeping the local
  fields up to date with one row of W per flip. With symmetric W and a non-negative
  diagonal the energy never rises (Hopfield 1982); a sweep with no flip ends the run.
* ``clamp=True`` keeps the cue's known units fixed while the others settle.

Ties in sign(h) keep the unit's previous value; a unit still at 0 whose field is exactly 0
takes +1, so the same cue always settles the same way.

Examples
--------
>>> import numpy as np
>>> from service.engine import HebbianRule, settle
>>> rng = np.random.default_rng(1)
>>> X = np.where(rng.random((3, 200)) < 0.5, -1, 1)
>>> rule = HebbianRule().fit(X)
>>> cue = X[:1].copy(); cue[0, :60] = 0          # 30 % of the units unknown
>>> result = settle(rule, cue)
>>> bool((result.states[0] == X[0]).all()), bool(result.converged[0])
(True, True)
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray

from ._checks import as_cues, check_choice, check_int
from .bits import row_dots
from .errors import ParameterError
from .rules import DenseRule, MemoryRule, check_fitted_rule

__all__ = ["MAX_STEPS", "MODES", "SettleResult", "settle"]

MODES: tuple[str, ...] = ("sync", "async")
#: Hard ceiling on the step limit a caller may ask for.
MAX_STEPS = 10_000
#: The dense loop hands its dot products on to the verdict up to this many (cues × memories):
#: 16 MB of float32 each for the cues and the states.
KEEP_DOTS_MAX = 4_000_000


@dataclass(frozen=True)
class SettleResult:
    """Outcome of settling a batch of cues.

    Attributes
    ----------
    states : ndarray of int8, shape (n_cues, n_units)
        Final states, values ±1.
    steps : ndarray of int64, shape (n_cues,)
        Update steps taken (sync: whole-state updates; async: sweeps), counting the last one,
        which found nothing to change.
    converged : ndarray of bool, shape (n_cues,)
        True where a fixed point was reached within the step limit.
    cycle_length : ndarray of int64, shape (n_cues,)
        2 where a 2-cycle was detected, 0 otherwise.
    energies : list of ndarray of float64, or None
        With ``record_energy``, the energy of each cue before the first step and after each
        step (length steps + 1).
    """

    states: NDArray[np.int8]
    steps: NDArray[np.int64]
    converged: NDArray[np.bool_]
    cycle_length: NDArray[np.int64]
    energies: list[NDArray[np.float64]] | None = None
    #: Dot products the run already computed, for :func:`~service.engine.verdict.judge` to
    #: reuse instead of multiplying again (exact integers): ``X c`` of each cue, and ``X s``
    #: of each final state where ``state_dots_known``. Only for these very ``cues``.
    cues: NDArray[np.int8] | None = field(default=None, repr=False, compare=False)
    cue_dots: NDArray[np.float32] | None = field(default=None, repr=False, compare=False)
    state_dots: NDArray[np.float32] | None = field(default=None, repr=False, compare=False)
    state_dots_known: NDArray[np.bool_] | None = field(default=None, repr=False, compare=False)

    @property
    def step_limit_hit(self) -> NDArray[np.bool_]:
        """True where the run stopped at the step limit without a fixed point or a cycle."""
        return np.asarray(~self.converged & (self.cycle_length == 0))


def _sign_keep(h: NDArray[np.float32], prev: NDArray[np.float32]) -> NDArray[np.float32]:
    """sign(h), keeping the previous value on ties and sending 0 with h = 0 to +1."""
    out = np.sign(h)
    tie = out == 0
    if tie.any():
        out[tie] = prev[tie]
        out[tie & (out == 0)] = 1.0
    return out.astype(np.float32, copy=False)


def settle(
    rule: MemoryRule,
    cues: Any,
    *,
    mode: str = "sync",
    clamp: bool = False,
    max_steps: int = 100,
    seed: int = 0,
    record_energy: bool = False,
) -> SettleResult:
    """Run the dynamics of a fitted rule from each cue.

    Parameters
    ----------
    rule : MemoryRule
        A fitted rule (:class:`~service.engine.rules.HebbianRule` and the others).
    cues : array_like, shape (n_cues, n_units)
        Values in {-1, 0, +1}; 0 = unknown. A single cue of shape (n_units,) is accepted.
    mode : {"sync", "async"}
    clamp : bool
        Keep the known units of each cue fixed.
    max_steps : int
        Step limit, 1 to :data:`MAX_STEPS`.
    seed : int
        Seed of the unit order in ``async`` mode.
    record_energy : bool
        Record each cue's energy before and after every step.

    Returns
    -------
    SettleResult
    """
    check_fitted_rule(rule)
    check_choice(mode, "mode", MODES)
    if not isinstance(clamp, bool):
        raise ParameterError(f"clamp must be true or false, got {clamp!r}")
    if not isinstance(record_energy, bool):
        raise ParameterError(f"record_energy must be true or false, got {record_energy!r}")
    limit = check_int(max_steps, "max_steps", low=1, high=MAX_STEPS)
    check_int(seed, "seed", low=0, high=2**63 - 1)
    c = as_cues(cues, "cues", n_units=rule.n_units_)
    if mode == "sync":
        if isinstance(rule, DenseRule) and not clamp and not record_energy:
            return _settle_dense(rule, c, limit)
        return _settle_sync(rule, c, clamp, limit, record_energy)
    return _settle_async(rule, c, clamp, limit, seed, record_energy)


def _settle_sync(
    rule: MemoryRule, cues: NDArray[np.int8], clamp: bool, limit: int, record: bool
) -> SettleResult:
    n_cues, _ = cues.shape
    known = cues != 0
    n_known = np.count_nonzero(known, axis=1).astype(np.int64)
    state = cues.astype(np.float32)
    prev = np.zeros_like(state)  # state one step back, for 2-cycle detection
    steps = np.zeros(n_cues, dtype=np.int64)
    converged = np.zeros(n_cues, dtype=bool)
    cycle = np.zeros(n_cues, dtype=np.int64)
    trace: list[list[float]] | None = None
    if record:
        trace = [[float(e)] for e in rule.energy(state, n_known)]
    # The confirming step is skipped only where its outcome is proven, and never when the
    # energy of every step was asked for.
    dense = rule if isinstance(rule, DenseRule) and trace is None else None
    active = np.arange(n_cues)
    for step in range(limit):
        s = state[active]
        confirmed = None
        if dense is not None:
            h, winner, runner, _, _ = dense._fields(s, n_known[active], signs_only=True)
        else:
            h = rule.local_fields(s, n_known[active])
        new = _sign_keep(h, s)
        if clamp:
            k = known[active]
            new[k] = s[k]
        steps[active] += 1
        if trace is not None:
            for i, e in zip(active, rule.energy(new, n_known[active]), strict=True):
                trace[i].append(float(e))
        fixed = (new == s).all(axis=1)
        if dense is not None and step + 1 < limit:
            confirmed = _dense_confirmed(dense, s, new, winner, runner, n_known[active]) & ~fixed
        two_cycle = ~fixed & (new == prev[active]).all(axis=1) if step > 0 else np.zeros_like(fixed)
        prev[active] = s
        state[active] = new
        converged[active[fixed]] = True
        cycle[active[two_cycle]] = 2
        done = fixed | two_cycle
        if confirmed is not None:
            confirmed &= ~two_cycle
            # the step that would find nothing to change still counts, as in the plain loop
            steps[active[confirmed]] += 1
            converged[active[confirmed]] = True
            done |= confirmed
        active = active[~done]
        if active.size == 0:
            break
    return SettleResult(
        states=state.astype(np.int8),
        steps=steps,
        converged=converged,
        cycle_length=cycle,
        energies=None if trace is None else [np.asarray(t) for t in trace],
    )


def _settle_dense(rule: DenseRule, cues: NDArray[np.int8], limit: int) -> SettleResult:
    """:func:`_settle_sync` for the dense rule without clamping or an energy trace, in fewer
    passes over the states (the common case, so it is worth its own loop).

    Where a state's readout is one-hot its new state is the winning pattern x_w, and what
    the general loop learns by comparing whole states follows from the best dot product,
    top = x_w·s, already at hand: s already is x_w exactly when top = N, and for s in
    {-1, 0, +1}ᴺ the distance ‖x_w − s‖₁ of the confirming-step bound is N − top. Only the
    other states take the general comparisons. The results are the general loop's, and the
    tests hold the two to each other.
    """
    n_cues, n_units = cues.shape
    state = cues.astype(np.float32)
    cue_products = rule._dots(state)  # counted once, for the lone-cue path and the loop alike
    # Σ s² counts the known units exactly (ones, in float32), a third of count_nonzero's time
    n_known = np.einsum("ij,ij->i", state, state).astype(np.int64)
    first = rule._rank(cue_products, rule._betas(state, n_known))
    if n_cues == 1:
        alone = _settle_one(rule, cues, limit, first)
        if alone is not None:
            return alone
    prev = np.empty_like(state)  # state one step back; read only where written
    steps = np.zeros(n_cues, dtype=np.int64)
    converged = np.zeros(n_cues, dtype=bool)
    cycle = np.zeros(n_cues, dtype=np.int64)
    active = np.arange(n_cues)
    keep = n_cues * rule.n_memories_ <= KEEP_DOTS_MAX  # dot products worth handing on
    cue_dots: NDArray[np.float32] | None = None
    state_dots = np.empty((n_cues, rule.n_memories_), dtype=np.float32) if keep else None
    state_known = np.zeros(n_cues, dtype=bool)
    done_at_once = _settled_at_once(rule, cues, limit, first, keep)
    if done_at_once is not None:
        return done_at_once
    for step in range(limit):
        whole = active.size == n_cues
        s = state if whole else state[active]
        known = n_known if whole else n_known[active]
        h, winner, runner, top, dots = rule._fields(
            s, known, signs_only=True, winners=first if step == 0 else None
        )
        if keep and step == 0:
            cue_dots = dots  # the first state is the cue itself
        one_hot = winner >= 0
        new = h  # a one-hot state's fields are its winning pattern, ±1 already
        fixed = top == n_units
        other = np.flatnonzero(~one_hot)
        if other.size:
            new[other] = _sign_keep(h[other], s[other])
            fixed[other] = (new[other] == s[other]).all(axis=1)
        steps[active] += 1
        if step > 0:
            two_cycle = ~fixed & (new == prev[active]).all(axis=1)
        else:
            two_cycle = np.zeros(active.size, dtype=bool)
        done = fixed | two_cycle
        if step + 1 < limit:
            gap = rule._one_hot_gap(rule._betas(s, known))
            confirmed = one_hot & ~done & _stays_on_winner(runner, top, n_units, gap)
            # the step that would find nothing to change still counts, as in the plain loop
            steps[active[confirmed]] += 1
            converged[active[confirmed]] = True
            done |= confirmed
        converged[active[fixed]] = True
        cycle[active[two_cycle]] = 2
        if state_dots is not None and fixed.any():  # s is the final state: its dots are known
            state_dots[active[fixed]] = dots[fixed]
            state_known[active[fixed]] = True
        going = np.flatnonzero(~done)
        prev[active[going]] = s[going]
        if whole:
            state = new
        else:
            state[active] = new
        active = active[going]
        if active.size == 0:
            break
    return SettleResult(
        states=state.astype(np.int8),
        steps=steps,
        converged=converged,
        cycle_length=cycle,
        cues=cues,
        cue_dots=cue_dots,
        state_dots=state_dots,
        state_dots_known=state_known if keep else None,
    )


def _stays_on_winner(runner: Any, top: Any, n_units: int, gap: Any) -> Any:
    """The confirming-step bound of :func:`_dense_confirmed` for a one-hot readout of a state
    in {-1, 0, +1}ᴺ, where ‖x_w − s‖₁ = N − x_w·s = N − top: scalars or arrays alike."""
    return runner + (n_units - top) < n_units - gap


def _settled_at_once(
    rule: DenseRule,
    cues: NDArray[np.int8],
    limit: int,
    first: tuple[Any, ...],
    keep: bool,
) -> SettleResult | None:
    """The result when every cue's first sign update is its best memory's pattern x_w and
    each cue either is x_w already or settles there in the next step (the common case);
    else None, and the loop decides.

    What :func:`_settle_dense` would find, without its loop. The first update is x_w where
    the readout is one-hot or x_w holds more than half the softmax weight (the tests of
    ``DenseRule._fields``, on the same numbers). A cue that is x_w stays; the others become
    x_w. A one-hot cue that the bound of :func:`_stays_on_winner` confirms settles there as
    the loop confirms it; for any other, x_w's next update is decided on the dot products
    x_w·x counted straight from the packed patterns (the loop's second step counts the same
    integers from the state): it is settled where that update, by the same two tests, is x_w
    again, and those products go on to the verdict. Where products are not kept, only cues
    the bound confirms are settled here.
    """
    dots, best, runner, top, one_hot, betas = first
    if not one_hot.all() and not (keep and _updates_to_best(rule, first).all()):
        return None
    n_cues, n_units = cues.shape
    fixed = top == n_units
    rows = np.flatnonzero(~fixed)
    state_dots = dots
    known = np.ones(n_cues, dtype=bool)
    if rows.size:
        if limit == 1:
            return None
        # one-hot cues the bound confirms are settled as the loop confirms them, without x_w's
        # products (the verdict counts those only if it needs them)
        proven = one_hot[rows]
        if proven.any():
            gap = rule._one_hot_gap(betas[rows[proven]])
            proven[proven] = _stays_on_winner(runner[rows[proven]], top[rows[proven]], n_units, gap)
        known[rows[proven]] = False
        unproven = rows[~proven]
        if unproven.size:
            if not keep:
                return None
            after = row_dots(rule._bits, best[unproven], n_units)
            full = np.full(unproven.size, n_units, dtype=np.int64)
            second = rule._rank(after, rule._betas(after, full))
            # x_w's own update is x_w again
            if not (_updates_to_best(rule, second) & (second[3] == n_units)).all():
                return None
            state_dots = dots.copy()
            state_dots[unproven] = after
    states = cues.copy()
    if rows.size:
        states[rows] = rule._x[best[rows]]  # ±1.0 → ±1 exactly
    return SettleResult(
        states=states,
        steps=np.where(fixed, 1, 2).astype(np.int64),  # the confirming step counts
        converged=np.ones(n_cues, dtype=bool),
        cycle_length=np.zeros(n_cues, dtype=np.int64),
        cues=cues if keep else None,
        cue_dots=dots if keep else None,
        state_dots=state_dots if keep else None,
        state_dots_known=known if keep else None,
    )


def _updates_to_best(rule: DenseRule, ranked: tuple[Any, ...]) -> NDArray[np.bool_]:
    """Whether each state's sign update is its best memory's pattern, from what
    ``DenseRule._rank`` gave: the readout is one-hot, or the best memory holds more than half
    the softmax weight (the two tests of ``DenseRule._fields``, on the same numbers)."""
    dots, _, _, _, one_hot, betas = ranked
    out = np.array(one_hot, dtype=bool)
    slow = np.flatnonzero(~out)
    if slow.size:
        out[slow] = rule._dominant(dots, betas, slow)
    return out


def _settle_one(
    rule: DenseRule, cues: NDArray[np.int8], limit: int, first: tuple[Any, ...]
) -> SettleResult | None:
    """A lone cue whose first readout is one-hot and settles in that step (or provably in
    the next), in a handful of scalar steps from what ``DenseRule._rank`` gave for it; None
    where the general loop must decide (it reuses the same ranking).

    The same tests and the same numbers as :func:`_settle_dense`'s first step, for one cue:
    there the array calls around the dot products cost more than the products.
    """
    dots, best_, runner_, top_, one_hot, betas = first
    if not one_hot[0]:
        return None
    n_units = cues.shape[1]
    n_mem = dots.shape[1]
    best, top, runner = int(best_[0]), float(top_[0]), float(runner_[0])
    gap = rule._one_hot_nats() / float(betas[0])  # DenseRule._one_hot_gap, as a scalar
    if top == n_units:  # the cue is the winning pattern: nothing changes
        steps, state, same = 1, cues.copy(), True
    elif limit > 1 and _stays_on_winner(runner, top, n_units, gap):
        steps = 2  # the proven confirming step counts, as in the loop
        state, same = rule._x[best : best + 1].astype(np.int8), False
    else:
        return None
    row = dots.reshape(1, n_mem)
    return SettleResult(
        states=state,
        steps=np.full(1, steps, dtype=np.int64),
        converged=np.ones(1, dtype=bool),
        cycle_length=np.zeros(1, dtype=np.int64),
        cues=cues,
        cue_dots=row,
        state_dots=row,
        state_dots_known=np.full(1, same),
    )


def _dense_confirmed(
    rule: DenseRule,
    s: NDArray[np.float32],
    new: NDArray[np.float32],
    winner: NDArray[np.intp],
    runner: NDArray[np.float64],
    n_known: NDArray[np.int64],
) -> NDArray[np.bool_]:
    """States whose next dense step is proven to find nothing to change.

    Where the readout was one-hot and the new state is the winning pattern x_w, the next
    step's dot products are x_j·x_w = x_j·s + x_j·(x_w − s) ≤ x_j·s + ‖x_w − s‖₁ for every
    other memory j, while x_w·x_w = N. If that bound still trails N by the one-hot gap, the
    next readout is x_w alone and its sign is x_w again (with ``clamp`` too, since the new
    state already is x_w): a fixed point, known without the second product over X.
    """
    n_units = s.shape[1]
    ok = winner >= 0
    if not ok.any():
        return ok
    hits = np.flatnonzero(ok)
    ok[hits] = (new[hits] == rule._x[winner[hits]]).all(axis=1)
    distance = np.abs(new - s).sum(axis=1, dtype=np.float64)
    gap = rule._one_hot_gap(rule._betas(s, n_known))
    return np.asarray(ok & (runner + distance < n_units - gap))


def _settle_async(
    rule: MemoryRule,
    cues: NDArray[np.int8],
    clamp: bool,
    limit: int,
    seed: int,
    record: bool,
) -> SettleResult:
    n_cues, n_units = cues.shape
    rng = np.random.default_rng(seed)
    known = cues != 0
    n_known = np.count_nonzero(known, axis=1).astype(np.int64)
    free = ~known if clamp else np.ones_like(known)
    state = cues.astype(np.float32)
    steps = np.zeros(n_cues, dtype=np.int64)
    converged = np.zeros(n_cues, dtype=bool)
    trace: list[list[float]] | None = None
    if record:
        trace = [[float(e)] for e in rule.energy(state, n_known)]
    # kept as the narrowed type, so the dense-only attributes below type-check
    dense = rule if isinstance(rule, DenseRule) else None
    active = np.arange(n_cues)
    for _ in range(limit):
        s = state[active]
        nk = n_known[active]
        fr = free[active]
        flipped = np.zeros(active.size, dtype=bool)
        if dense is not None:
            # logits β' X s are kept current; one flip moves them by β' Δ x_i
            betas = dense._betas(s, nk)
            logits = dense.logits(s, nk)
            # unit-major for this run only: each unit's column is then one contiguous row
            xs = np.ascontiguousarray(dense._x.T)
        else:
            fields = rule.local_fields(s, nk)
        for unit in rng.permutation(n_units):
            if dense is not None:
                z = logits - logits.max(axis=1, keepdims=True)
                a = np.exp(z)
                # a product and a row sum, not a matrix-vector product: each state's field
                # is then summed the same way whatever other states share the batch
                h_u = (a * xs[unit]).sum(axis=1) / a.sum(axis=1)
            else:
                h_u = fields[:, unit]
            cur = s[:, unit]
            new = np.sign(h_u).astype(np.float32)
            tie = new == 0
            new[tie] = cur[tie]
            new[tie & (new == 0)] = 1.0
            delta = (new - cur) * fr[:, unit]
            moved = np.flatnonzero(delta)
            if moved.size == 0:
                continue
            s[moved, unit] += delta[moved]
            flipped[moved] = True
            if dense is not None:
                logits[moved] += (betas[moved] * delta[moved])[:, None] * xs[unit][None, :]
            else:
                fields[moved] += delta[moved][:, None] * rule.unit_weights(unit)[None, :]
        state[active] = s
        steps[active] += 1
        if trace is not None:
            for i, e in zip(active, rule.energy(s, nk), strict=True):
                trace[i].append(float(e))
        converged[active[~flipped]] = True
        active = active[flipped]
        if active.size == 0:
            break
    return SettleResult(
        states=state.astype(np.int8),
        steps=steps,
        converged=converged,
        cycle_length=np.zeros(n_cues, dtype=np.int64),
        energies=None if trace is None else [np.asarray(t) for t in trace],
    )

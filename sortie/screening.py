"""Screening: find the few parameters that move the solver outputs, from few runs.

A shape with 15-20 parameters cannot be modelled with a surrogate on a CFD budget, but usually
only a handful of them matter. This module holds the screening methods as pure functions on the
unit cube ``[0, 1]^n_dims`` (the design space maps to physical values), and the rule that turns
their numbers into a choice of parameters:

* :func:`morris_trajectories` and :func:`morris_effects` -- Morris elementary effects [1]_ with
  the two improvements of Campolongo, Cariboni & Saltelli [2]_: ``mu_star`` (the mean of the
  absolute effects, so that effects of opposite sign do not cancel) and trajectories chosen from
  a larger random pool for spread (:func:`select_trajectories`, :func:`trajectory_spread`).
  ``r`` trajectories cost ``r (n_dims + 1)`` runs and see interactions and curvature through
  ``sigma``.
* :func:`sweep_effects` -- the change of each output along one-at-a-time sweeps through the
  baseline (designs from :func:`sortie.sampling.one_at_a_time`): the engineer's first look,
  blind to interactions.
* :func:`select_parameters` -- keep the top k, those above a fraction of the largest
  importance, or a named list; every parameter gets a one-line reason with the numbers.

Outputs are always 2-D, ``(n_runs, n_outputs)``, one column per goal quantity (objective and
each constraint, per condition), and results are ``(n_dims, n_outputs)``: the screening choice
has to look at all of them at once (see :func:`combine_importance`). A failed run is a NaN in
its row; the effects that need it are dropped and the results say how many remain.

References
----------
.. [1] M. D. Morris, "Factorial sampling plans for preliminary computational experiments",
   Technometrics 33(2):161-174, 1991.
.. [2] F. Campolongo, J. Cariboni and A. Saltelli, "An effective screening design for
   sensitivity analysis of large models", Environ. Model. Softw. 22(10):1509-1518, 2007.
.. [3] D. C. Montgomery, *Design and Analysis of Experiments*, Wiley (one-factor-at-a-time
   strategies).
"""

from __future__ import annotations

import itertools
import math
import numbers
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy.spatial.distance import cdist

__all__ = [
    "MorrisResult",
    "Selection",
    "SweepEffects",
    "combine_importance",
    "morris_delta",
    "morris_effects",
    "morris_trajectories",
    "select_parameters",
    "select_trajectories",
    "sweep_effects",
    "trajectory_spread",
]

Seed = int | np.random.Generator | None

# Coordinates closer than this are "the same": a Morris step or a sweep point moves a coordinate by
# at least 1/(levels - 1) of the cube, far above round-off from the unit-cube map.
_SAME_TOL = 1e-12
# Largest number of r-subsets of the pool that select_trajectories enumerates exactly; above it the
# greedy-plus-exchange search is used. 20 000 subsets of r = 10 cost a few milliseconds.
_EXACT_LIMIT = 20_000
# Pool size per requested trajectory when the caller gives none. Campolongo et al. (2007) use pools
# of 500-1000; ten per trajectory already gives most of the spread and keeps the O(pool^2 k^3)
# distance computation well under a second for k = 20.
_POOL_PER_TRAJECTORY = 10


# --------------------------------------------------------------------------- validation


def _check_int(name: str, value: object, minimum: int = 1) -> int:
    if isinstance(value, bool) or not isinstance(value, numbers.Integral) or value < minimum:
        raise ValueError(f"{name} must be an integer >= {minimum}, got {value!r}.")
    return int(value)


def _check_names(kind: str, names: Sequence[str] | None, count: int, default: str) -> tuple[str, ...]:
    """Return ``count`` names: the given ones (checked for length and uniqueness) or defaults."""
    if names is None:
        return tuple(f"{default}{i}" for i in range(count))
    names = tuple(str(n) for n in names)
    if len(names) != count:
        raise ValueError(f"{kind} must have {count} entries (one per column), got {len(names)}: {list(names)!r}.")
    if len(set(names)) != len(names):
        raise ValueError(f"{kind} must be unique, got {list(names)!r}.")
    return names


def _check_design(X: object, name: str = "X") -> np.ndarray:
    arr = np.asarray(X, dtype=float)
    if arr.ndim != 2 or arr.size == 0:
        raise ValueError(f"{name} must be a non-empty array of shape (n_runs, n_dims), got shape {arr.shape}.")
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"{name} must be finite; designs are never NaN (a failed run is NaN in y, not in X).")
    return arr


def _check_outputs(y: object, n_runs: int) -> np.ndarray:
    """Outputs as (n_runs, n_outputs) with every non-finite value (failed run) turned into NaN."""
    arr = np.asarray(y, dtype=float)
    if arr.ndim == 1:
        arr = arr[:, None]
    if arr.ndim != 2 or arr.shape[0] != n_runs or arr.shape[1] == 0:
        raise ValueError(f"y must have shape ({n_runs}, n_outputs) or ({n_runs},), got shape {arr.shape}.")
    return np.where(np.isfinite(arr), arr, np.nan)


def _masked_stats(values: np.ndarray, axis: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Count, mean, mean of |.| and sample std (ddof=1) over ``axis``, ignoring NaN, without warnings.

    Statistics with too few values are NaN (no value: all three; one value: the std).
    """
    valid = np.isfinite(values)
    count = valid.sum(axis=axis)
    filled = np.where(valid, values, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = filled.sum(axis=axis) / count
        mean_abs = np.abs(filled).sum(axis=axis) / count
        dev = np.where(valid, values - np.expand_dims(mean, axis), 0.0)
        std = np.sqrt((dev**2).sum(axis=axis) / (count - 1))
    mean = np.where(count > 0, mean, np.nan)
    mean_abs = np.where(count > 0, mean_abs, np.nan)
    std = np.where(count > 1, std, np.nan)
    return count, mean, mean_abs, std


# --------------------------------------------------------------------------- Morris design


def morris_delta(levels: int) -> float:
    """Morris step ``Δ = p / (2 (p - 1))`` for a ``p``-level grid on ``[0, 1]``.

    With this step and base values drawn from the lower half of the grid, every grid level is
    visited with the same probability (Morris 1991 [1]_, section 3), which is why it is the
    recommended choice. ``p = 4`` gives ``Δ = 2/3`` (CHECKS.md §5).

    Parameters
    ----------
    levels : int
        Number of grid levels ``p``, even and >= 2.

    Returns
    -------
    float
        The step in unit-cube coordinates.
    """
    levels = _check_int("levels", levels, minimum=2)
    if levels % 2:
        raise ValueError(f"levels must be even (so that Δ = p/(2(p-1)) lands on the grid), got {levels}.")
    return levels / (2.0 * (levels - 1))


def _random_trajectories(n_dims: int, count: int, levels: int, rng: np.random.Generator) -> np.ndarray:
    """Draw ``count`` Morris trajectories, shape (count, n_dims + 1, n_dims), in the unit cube.

    Morris's orientation matrix ``B* = (J x* + (Δ/2)[(2B - J) D* + J]) P*`` [1]_, written out: a
    base point ``x*`` on the lower half of the grid, a random direction ``D*`` per coordinate and a
    random order ``P*`` in which the coordinates move. Coordinate ``i`` is ``x*_i`` before its move
    and ``x*_i + Δ`` after it (direction +1), or the reverse (direction -1).
    """
    delta = morris_delta(levels)
    base = rng.integers(0, levels // 2, size=(count, n_dims)) / (levels - 1)
    up = rng.integers(0, 2, size=(count, n_dims)).astype(bool)
    order = rng.permuted(np.tile(np.arange(n_dims), (count, 1)), axis=1)
    rank = np.argsort(order, axis=1)  # rank[m, i]: the step (0-based) at which coordinate i moves
    moved = rank[:, None, :] < np.arange(n_dims + 1)[None, :, None]  # (count, k + 1, k)
    offset = np.where(up[:, None, :], moved, ~moved)
    return np.clip(base[:, None, :] + delta * offset, 0.0, 1.0)


def _as_trajectories(trajectories: object, n_dims: int | None = None) -> np.ndarray:
    """Accept (n_traj, k + 1, k) or a stacked design (n_traj (k + 1), k); return the 3-D form."""
    arr = np.asarray(trajectories, dtype=float)
    if arr.ndim == 2:
        k = arr.shape[1] if n_dims is None else n_dims
        if arr.shape[0] % (k + 1):
            raise ValueError(
                f"a Morris design with {k} columns must have a multiple of {k + 1} rows (k + 1 per trajectory), got {arr.shape[0]}."
            )
        arr = arr.reshape(-1, k + 1, k)
    if arr.ndim != 3 or arr.shape[1] != arr.shape[2] + 1 or arr.shape[0] == 0:
        raise ValueError(f"trajectories must have shape (n_trajectories, n_dims + 1, n_dims), got {arr.shape}.")
    return arr


def _squared_distances(trajectories: np.ndarray) -> np.ndarray:
    """Campolongo distances squared, ``d_ml^2``, between all trajectories: shape (n_traj, n_traj).

    ``d_ml`` is the sum of the Euclidean distances between every point of trajectory ``m`` and
    every point of trajectory ``l`` [2]_. Computed one trajectory against the later ones, so memory
    stays at (k + 1) x n_traj (k + 1) floats instead of the full point-by-point matrix.
    """
    count, n_pts, n_dims = trajectories.shape
    flat = trajectories.reshape(count * n_pts, n_dims)
    d2 = np.zeros((count, count))
    for m in range(count - 1):
        block = cdist(trajectories[m], flat[(m + 1) * n_pts :])  # (k + 1, (count - m - 1)(k + 1))
        d = block.reshape(n_pts, count - m - 1, n_pts).sum(axis=(0, 2))
        d2[m, m + 1 :] = d2[m + 1 :, m] = d**2
    return d2


def trajectory_spread(trajectories: np.ndarray, n_dims: int | None = None) -> float:
    """Campolongo's spread of a set of trajectories, ``sqrt(sum_{m<l} d_ml^2)``.

    Larger is better: the trajectories explore more of the cube, so fewer of them repeat what
    another one already saw [2]_.

    Parameters
    ----------
    trajectories : array-like of shape (n_trajectories, n_dims + 1, n_dims) or (n_trajectories (n_dims + 1), n_dims)
        Trajectories, or a stacked Morris design as :func:`morris_trajectories` returns it.
    n_dims : int, optional
        Only for the stacked form, when the columns are not the dimensions (never in sortie).

    Returns
    -------
    float
        The spread; 0 for a single trajectory.
    """
    arr = _as_trajectories(trajectories, n_dims)
    return float(math.sqrt(np.triu(_squared_distances(arr), 1).sum()))


def select_trajectories(trajectories: np.ndarray, n_trajectories: int) -> np.ndarray:
    """Choose ``n_trajectories`` of a pool that maximise :func:`trajectory_spread`.

    This is the optimisation step of Campolongo, Cariboni & Saltelli (2007) [2]_. Their brute
    force over all subsets is affordable only for small pools, so two searches are used:

    * **exact** when the pool has at most 20 000 subsets of the requested size: every subset
      is scored and the best is returned (ties go to the first in lexicographic order);
    * otherwise **greedy forward selection then single exchanges**: start from the farthest
      pair, add the trajectory that increases ``sum d_ml^2`` most until there are enough, then
      swap one chosen and one unchosen trajectory while a swap increases it. The result is a
      local optimum: no single swap improves it. That is not guaranteed to be the global
      optimum, but the criterion is flat near the top and the difference is far below the
      gain over a random choice.

    Parameters
    ----------
    trajectories : array-like of shape (pool, n_dims + 1, n_dims)
        The candidate trajectories.
    n_trajectories : int
        How many to keep, 1 <= n_trajectories <= pool.

    Returns
    -------
    ndarray of int, shape (n_trajectories,)
        Indices into the pool, in increasing order (so the design keeps the draw order).
    """
    pool = _as_trajectories(trajectories)
    count = pool.shape[0]
    r = _check_int("n_trajectories", n_trajectories)
    if r > count:
        raise ValueError(f"n_trajectories must be at most the pool size {count}, got {r}.")
    if r == count:
        return np.arange(count)
    if r == 1:
        return np.array([0])  # a single trajectory has no spread; keep the first drawn
    d2 = _squared_distances(pool)
    if math.comb(count, r) <= _EXACT_LIMIT:
        best, best_idx = -1.0, None
        combos = itertools.combinations(range(count), r)
        while chunk := list(itertools.islice(combos, 4096)):
            idx = np.array(chunk)
            scores = d2[idx[:, :, None], idx[:, None, :]].sum(axis=(1, 2))
            top = int(np.argmax(scores))
            if scores[top] > best:
                best, best_idx = float(scores[top]), idx[top]
        return np.sort(best_idx)
    # Greedy forward selection from the farthest pair.
    first, second = np.unravel_index(int(np.argmax(d2)), d2.shape)
    chosen = [int(first), int(second)]
    gain = d2[first] + d2[second]  # sum of d^2 from every candidate to the chosen set
    while len(chosen) < r:
        masked = gain.copy()
        masked[chosen] = -np.inf
        c = int(np.argmax(masked))
        chosen.append(c)
        gain += d2[c]
    # Single exchanges until none improves: swapping s out and c in changes the criterion by
    # gain[c] - d2[c, s] - gain[s] (gain[s] includes d2[s, s] = 0).
    chosen_mask = np.zeros(count, dtype=bool)
    chosen_mask[chosen] = True
    for _ in range(100 * r):  # each swap strictly increases a bounded criterion; the cap is a safety net
        ins = np.flatnonzero(~chosen_mask)
        outs = np.flatnonzero(chosen_mask)
        delta = gain[ins][None, :] - d2[np.ix_(outs, ins)] - gain[outs][:, None]
        o, i = np.unravel_index(int(np.argmax(delta)), delta.shape)
        if delta[o, i] <= 1e-12 * max(1.0, float(gain.max())):
            break
        s, c = outs[o], ins[i]
        chosen_mask[s], chosen_mask[c] = False, True
        gain += d2[c] - d2[s]
    return np.flatnonzero(chosen_mask)


def morris_trajectories(
    n_dims: int,
    n_trajectories: int,
    *,
    levels: int = 4,
    pool: int | None = None,
    seed: Seed,
) -> np.ndarray:
    """Morris screening design: ``n_trajectories`` one-at-a-time paths on a ``levels``-level grid.

    Each trajectory starts at a random grid point and moves every coordinate once, by
    ``±Δ = ±levels / (2 (levels - 1))``, in random order [1]_, so ``n_dims + 1`` consecutive rows
    give one elementary effect per parameter. The trajectories are chosen for spread out of a
    random pool of ``pool`` candidates (Campolongo et al. 2007 [2]_; see
    :func:`select_trajectories` for the search).

    Parameters
    ----------
    n_dims : int
        Number of parameters ``k``, >= 1.
    n_trajectories : int
        Number of trajectories ``r``, >= 1; 10-20 is usual. The design has ``r (k + 1)`` rows.
    levels : int, default 4
        Grid levels ``p``, even and >= 2. Four levels (``Δ = 2/3``) is the common choice.
    pool : int, optional
        Candidate trajectories to choose from, >= ``n_trajectories``. Default
        ``10 * n_trajectories``; ``pool = n_trajectories`` gives Morris's plain random design.
    seed : int, numpy.random.Generator or None
        Drives every random draw; the same integer seed and arguments give the same design.

    Returns
    -------
    ndarray of shape (n_trajectories * (n_dims + 1), n_dims)
        Unit-cube points, trajectory after trajectory. Every value is on the grid
        ``{0, 1/(p-1), ..., 1}`` and consecutive rows within a trajectory differ in exactly one
        coordinate, by ``Δ``.

    Raises
    ------
    ValueError
        If an argument is outside the allowed values.

    Examples
    --------
    >>> X = morris_trajectories(3, 4, seed=0)
    >>> X.shape
    (16, 3)
    """
    n_dims = _check_int("n_dims", n_dims)
    r = _check_int("n_trajectories", n_trajectories)
    morris_delta(levels)  # validates levels
    pool = _POOL_PER_TRAJECTORY * r if pool is None else _check_int("pool", pool)
    if pool < r:
        raise ValueError(f"pool must be at least n_trajectories ({r}), got {pool}.")
    rng = np.random.default_rng(seed)
    candidates = _random_trajectories(n_dims, pool, int(levels), rng)
    chosen = select_trajectories(candidates, r) if pool > r else np.arange(r)
    return candidates[chosen].reshape(r * (n_dims + 1), n_dims)


# --------------------------------------------------------------------------- Morris effects


@dataclass(frozen=True)
class MorrisResult:
    """Elementary-effect statistics per parameter (rows) and per output (columns).

    Attributes
    ----------
    names : tuple of str
        Parameter names, one per row.
    output_names : tuple of str
        Output names, one per column.
    effects : ndarray of shape (n_trajectories, n_dims, n_outputs)
        Each elementary effect, per unit of unit-cube coordinate; NaN where a run it needs failed.
    mu : ndarray of shape (n_dims, n_outputs)
        Mean effect. Near 0 with a large ``mu_star`` means effects of both signs (non-monotone).
    mu_star : ndarray of shape (n_dims, n_outputs)
        Mean absolute effect [2]_: the importance measure used for selection.
    sigma : ndarray of shape (n_dims, n_outputs)
        Sample standard deviation (ddof=1) of the effects: large for interactions or curvature.
        NaN with fewer than two usable effects.
    n_effects : ndarray of int, shape (n_dims, n_outputs)
        Number of effects behind each statistic (``n_trajectories`` when nothing failed).
    """

    names: tuple[str, ...]
    output_names: tuple[str, ...]
    effects: np.ndarray
    mu: np.ndarray
    mu_star: np.ndarray
    sigma: np.ndarray
    n_effects: np.ndarray

    @property
    def n_trajectories(self) -> int:
        """Number of trajectories in the design."""
        return int(self.effects.shape[0])

    @property
    def n_dropped(self) -> np.ndarray:
        """Effects lost to failed runs, shape (n_dims, n_outputs)."""
        return self.n_trajectories - self.n_effects


def morris_effects(
    X: np.ndarray,
    y: np.ndarray,
    *,
    names: Sequence[str] | None = None,
    output_names: Sequence[str] | None = None,
) -> MorrisResult:
    """Elementary effects of a Morris design and their statistics μ, μ* and σ.

    The effect of parameter ``i`` along a trajectory is ``(y(x') - y(x)) / (x'_i - x_i)``, where
    ``x`` and ``x'`` are the consecutive rows in which coordinate ``i`` moves [1]_. Dividing by the
    *actual* step in unit-cube coordinates (``±Δ`` for a design from :func:`morris_trajectories`)
    makes the effect of a linear model ``sum c_i u_i`` exactly ``c_i``, whatever the direction, and
    lets designs read back from the ledger (rounded, or with snapped integer parameters) be used
    as they are.

    Parameters
    ----------
    X : array-like of shape (n_trajectories * (n_dims + 1), n_dims)
        The design, trajectory after trajectory, in unit-cube coordinates. Within a trajectory,
        each consecutive pair of rows must differ in exactly one coordinate and every coordinate
        must move exactly once.
    y : array-like of shape (n_runs, n_outputs) or (n_runs,)
        Outputs in the row order of ``X``. NaN (or inf) marks a failed run: the (at most two)
        effects that use it are dropped for that output, and ``n_effects`` counts what is left.
    names : sequence of str, optional
        Parameter names (default ``x0, x1, ...``).
    output_names : sequence of str, optional
        Output names (default ``y0, y1, ...``).

    Returns
    -------
    MorrisResult

    Raises
    ------
    ValueError
        If the shapes do not match or ``X`` is not made of one-at-a-time trajectories.

    Examples
    --------
    >>> X = morris_trajectories(2, 5, seed=1)
    >>> res = morris_effects(X, 3.0 * X[:, 0] - X[:, 1])
    >>> np.round(res.mu[:, 0], 12).tolist(), bool(res.sigma.max() < 1e-12)
    ([3.0, -1.0], True)
    """
    X = _check_design(X)
    n_runs, n_dims = X.shape
    traj = _as_trajectories(X)
    r = traj.shape[0]
    Y = _check_outputs(y, n_runs)
    n_out = Y.shape[1]
    names = _check_names("names", names, n_dims, "x")
    output_names = _check_names("output_names", output_names, n_out, "y")

    steps = np.diff(traj, axis=1)  # (r, k, k): step j, coordinate i
    moved = np.abs(steps) > _SAME_TOL
    bad_steps = np.argwhere(moved.sum(axis=2) != 1)
    if bad_steps.size:
        t, j = bad_steps[0]
        raise ValueError(
            f"X is not a Morris design: in trajectory {t}, rows {j} and {j + 1} differ in {int(moved[t, j].sum())} "
            "coordinates instead of exactly one."
        )
    bad_dims = np.argwhere(moved.sum(axis=1) != 1)
    if bad_dims.size:
        t, i = bad_dims[0]
        raise ValueError(
            f"X is not a Morris design: in trajectory {t}, coordinate {i} ({names[i]}) moves "
            f"{int(moved[t, :, i].sum())} times instead of exactly once."
        )
    dim = np.argmax(moved, axis=2)  # (r, k): which coordinate moves at step j
    step = np.take_along_axis(steps, dim[:, :, None], axis=2)[:, :, 0]  # (r, k)
    dy = np.diff(Y.reshape(r, n_dims + 1, n_out), axis=1)  # (r, k, n_out); NaN where a run failed
    effects = np.empty((r, n_dims, n_out))
    effects[np.arange(r)[:, None], dim, :] = dy / step[:, :, None]
    count, mu, mu_star, sigma = _masked_stats(effects, axis=0)
    return MorrisResult(names, output_names, effects, mu, mu_star, sigma, count.astype(int))


# --------------------------------------------------------------------------- one-at-a-time sweeps


@dataclass(frozen=True)
class SweepEffects:
    """How each output changes along one-at-a-time sweeps through the baseline.

    Attributes
    ----------
    names, output_names : tuple of str
        Parameter names (rows) and output names (columns).
    baseline : ndarray of shape (n_dims,)
        The baseline point in the unit cube (the first row of the design).
    span : ndarray of shape (n_dims, n_outputs)
        ``max - min`` of the output over the sweep of each parameter, baseline included: how much
        the output can move with this parameter alone. NaN with fewer than two usable points.
    slope : ndarray of shape (n_dims, n_outputs)
        Least-squares slope of the output against the unit-cube coordinate over the same points
        (per unit of the cube; the exact coefficient for a linear model). NaN with fewer than two.
    n_points : ndarray of int, shape (n_dims, n_outputs)
        Usable points (successful runs) behind each number, baseline included.
    sweeps : tuple of (u, y) pairs, one per parameter
        ``u`` of shape (m,) sorted increasingly and ``y`` of shape (m, n_outputs) (NaN where a run
        failed), the raw curve for plots.
    """

    names: tuple[str, ...]
    output_names: tuple[str, ...]
    baseline: np.ndarray
    span: np.ndarray
    slope: np.ndarray
    n_points: np.ndarray
    sweeps: tuple[tuple[np.ndarray, np.ndarray], ...]


def sweep_effects(
    X: np.ndarray,
    y: np.ndarray,
    *,
    names: Sequence[str] | None = None,
    output_names: Sequence[str] | None = None,
) -> SweepEffects:
    """Range and slope of each output along one-at-a-time sweeps.

    The design is read, not assumed: the first row is the baseline and every other row must
    differ from it in exactly one coordinate, which says which sweep it belongs to. That is the
    layout of :func:`sortie.sampling.one_at_a_time` (whose sweeps skip a level equal to the
    baseline), and also of any hand-made sweep. Rows equal to the baseline are ignored.

    One-at-a-time numbers depend on the baseline and cannot see interactions [3]_; prefer
    :func:`morris_effects` for the selection and use these to show the engineer the curves.

    Parameters
    ----------
    X : array-like of shape (n_runs, n_dims)
        Baseline first, then the sweep points, in unit-cube coordinates.
    y : array-like of shape (n_runs, n_outputs) or (n_runs,)
        Outputs in the row order of ``X``; NaN (or inf) marks a failed run, which is left out.
    names, output_names : sequence of str, optional
        Parameter and output names (default ``x0, ...`` and ``y0, ...``).

    Returns
    -------
    SweepEffects

    Raises
    ------
    ValueError
        If the shapes do not match or a row differs from the baseline in more than one coordinate.

    Examples
    --------
    >>> from sortie.sampling import one_at_a_time
    >>> X = one_at_a_time([0.5, 0.5], levels=3)
    >>> eff = sweep_effects(X, 2.0 * X[:, 0])
    >>> eff.span[:, 0].tolist(), eff.slope[:, 0].tolist()
    ([2.0, 0.0], [2.0, 0.0])
    """
    X = _check_design(X)
    n_runs, n_dims = X.shape
    Y = _check_outputs(y, n_runs)
    n_out = Y.shape[1]
    names = _check_names("names", names, n_dims, "x")
    output_names = _check_names("output_names", output_names, n_out, "y")
    base = X[0]
    moved = np.abs(X[1:] - base) > _SAME_TOL  # (n_runs - 1, k)
    n_moved = moved.sum(axis=1)
    bad = np.flatnonzero(n_moved > 1)
    if bad.size:
        raise ValueError(
            f"X is not a one-at-a-time sweep: row {bad[0] + 1} differs from the baseline (row 0) in "
            f"{int(n_moved[bad[0]])} coordinates instead of one."
        )
    owner = np.where(n_moved == 1, np.argmax(moved, axis=1), -1)
    span = np.full((n_dims, n_out), np.nan)
    slope = np.full((n_dims, n_out), np.nan)
    n_points = np.zeros((n_dims, n_out), dtype=int)
    sweeps = []
    for i in range(n_dims):
        rows = np.concatenate([[0], 1 + np.flatnonzero(owner == i)])
        order = np.argsort(X[rows, i], kind="stable")
        u, ys = X[rows, i][order], Y[rows][order]
        sweeps.append((u, ys))
        for j in range(n_out):
            ok = np.isfinite(ys[:, j])
            n_points[i, j] = int(ok.sum())
            if ok.sum() < 2:
                continue
            uj, yj = u[ok], ys[ok, j]
            span[i, j] = float(yj.max() - yj.min())
            du = uj - uj.mean()
            slope[i, j] = float(du @ (yj - yj.mean()) / (du @ du))
    return SweepEffects(names, output_names, base.copy(), span, slope, n_points, tuple(sweeps))


# --------------------------------------------------------------------------- selection


def combine_importance(importance: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """One importance per parameter from several outputs: ``max_j (m_ij / max_i m_ij)``.

    Outputs have different units and scales (a drag area, a pressure margin, a temperature), so
    each column is first divided by its largest value: the parameter that matters most for an
    output scores 1 on it. The maximum across outputs then keeps any parameter that matters a lot
    for *one* output, even if it is irrelevant to the others -- a constraint driven by a parameter
    the objective ignores still needs that parameter free, or later stages can neither see nor
    repair the violation. A mean across outputs would dilute it by the number of outputs.

    Parameters
    ----------
    importance : array-like of shape (n_dims, n_outputs) or (n_dims,)
        Non-negative importance per parameter and output, such as ``MorrisResult.mu_star`` or
        ``SweepEffects.span``. NaN means "unknown" and is skipped; a column whose largest value is
        0 (an output no parameter moves) contributes 0.

    Returns
    -------
    score : ndarray of shape (n_dims,)
        Combined importance in ``[0, 1]``; NaN for a parameter unknown on every output.
    driver : ndarray of int, shape (n_dims,)
        Column at which each score is reached (-1 where the score is NaN).
    """
    m = np.asarray(importance, dtype=float)
    if m.ndim == 1:
        m = m[:, None]
    if m.ndim != 2 or m.size == 0:
        raise ValueError(f"importance must have shape (n_dims, n_outputs) or (n_dims,), got {np.shape(importance)}.")
    if np.any(m[np.isfinite(m)] < 0):
        raise ValueError("importance must be non-negative (use mu_star or a span, not mu or a slope).")
    m = np.where(np.isfinite(m), m, np.nan)
    col_max = np.array([np.max(c[np.isfinite(c)]) if np.isfinite(c).any() else np.nan for c in m.T])
    with np.errstate(invalid="ignore", divide="ignore"):
        norm = np.where(col_max > 0, m / col_max, np.where(np.isfinite(m), 0.0, np.nan))
    known = np.isfinite(norm)
    filled = np.where(known, norm, -np.inf)
    driver = np.argmax(filled, axis=1)
    score = filled[np.arange(m.shape[0]), driver]
    unknown = ~known.any(axis=1)
    return np.where(unknown, np.nan, score), np.where(unknown, -1, driver)


@dataclass(frozen=True)
class Selection:
    """Which parameters stay free for the later stages, and why.

    Attributes
    ----------
    selected : tuple of str
        Free parameters, in the order of ``names``.
    fixed : tuple of str
        Parameters to hold at their baseline, in the order of ``names``.
    reasons : dict of str to str
        One line per parameter (all of them, in order): selected or fixed, and the numbers.
    scores : ndarray of shape (n_dims,) or None
        Combined importance from :func:`combine_importance`; None for a named list given
        without screening numbers.
    rule : str
        The rule applied, e.g. ``"top 4"``, ``"fraction 0.1"``, ``"named list"``.
    """

    selected: tuple[str, ...]
    fixed: tuple[str, ...]
    reasons: dict[str, str]
    scores: np.ndarray | None
    rule: str


def select_parameters(
    importance: np.ndarray | None,
    names: Sequence[str],
    *,
    top: int | None = None,
    fraction: float | None = None,
    keep: Sequence[str] | None = None,
    output_names: Sequence[str] | None = None,
    measure: str = "μ*",
) -> Selection:
    """Keep the parameters that matter; the rest are fixed at their baseline.

    Exactly one rule is given:

    * ``top=k`` keeps the ``k`` highest scores (ties broken by the order of ``names``);
    * ``fraction=f`` keeps every parameter whose score is at least ``f`` times the largest
      (scores are already relative, so that is ``score >= f``);
    * ``keep=[...]`` keeps the named parameters, whatever the numbers say.

    The score is :func:`combine_importance` of ``importance`` (normally ``MorrisResult.mu_star``):
    each output divided by its largest value, then the maximum over outputs. A parameter with no
    usable number at all (every run around it failed) is **kept** by ``top`` and ``fraction``, on
    top of what the rule selects: fixing a parameter that nobody measured would be a silent
    decision, so it is left free and the reason says so.

    Parameters
    ----------
    importance : array-like of shape (n_dims, n_outputs) or (n_dims,), or None
        Non-negative importance per parameter and output. May be None only with ``keep``.
    names : sequence of str
        Parameter names in row order.
    top : int, optional
        Number of parameters to keep, 1 <= top <= n_dims.
    fraction : float, optional
        Relative threshold in (0, 1].
    keep : sequence of str, optional
        Parameter names to keep; every name must be in ``names``.
    output_names : sequence of str, optional
        Column names of ``importance``, for the reasons (default ``y0, y1, ...``).
    measure : str, default "μ*"
        What ``importance`` holds, for the reasons (``"span"`` for sweep ranges, say).

    Returns
    -------
    Selection
        If no parameter moves any output (every score 0), ``fraction`` selects none: screening
        found nothing to optimise, and the caller should stop and say so rather than guess.

    Raises
    ------
    ValueError
        If not exactly one rule is given, a rule value is out of range, or ``keep`` names a
        parameter that does not exist (the message lists the allowed names).

    Examples
    --------
    >>> sel = select_parameters(np.array([[4.0], [0.1], [2.0]]), ["tail_angle", "fin_gap", "flare"], top=2)
    >>> sel.selected
    ('tail_angle', 'flare')
    >>> sel.reasons["fin_gap"]
    'fixed: score 0.025 (rank 3 of 3; μ* 0.1 on y0, whose largest is 4); rule top 2 keeps ranks 1-2'
    """
    names = tuple(str(n) for n in names)
    if len(set(names)) != len(names) or not names:
        raise ValueError(f"names must be a non-empty list of unique parameter names, got {list(names)!r}.")
    rules = [r for r, v in (("top", top), ("fraction", fraction), ("keep", keep)) if v is not None]
    if len(rules) != 1:
        raise ValueError(f"give exactly one selection rule out of top, fraction or keep, got {rules or 'none'}.")
    n = len(names)

    if importance is None:
        if keep is None:
            raise ValueError("importance is needed for the top and fraction rules; only keep works without it.")
        scores = raw = driver = None
        out_names: tuple[str, ...] = ()
    else:
        raw = np.asarray(importance, dtype=float)
        raw = raw[:, None] if raw.ndim == 1 else raw
        if raw.ndim != 2 or raw.shape[0] != n:
            raise ValueError(f"importance must have {n} rows (one per name), got shape {np.shape(importance)}.")
        out_names = _check_names("output_names", output_names, raw.shape[1], "y")
        scores, driver = combine_importance(raw)

    known = np.ones(n, bool) if scores is None else np.isfinite(scores)
    rank = np.zeros(n, dtype=int)
    if scores is not None:
        order = sorted(np.flatnonzero(known), key=lambda i: (-scores[i], i))
        rank[order] = np.arange(1, len(order) + 1)

    if top is not None:
        k = _check_int("top", top)
        if k > n:
            raise ValueError(f"top must be at most the number of parameters ({n}), got {k}.")
        chosen = (rank >= 1) & (rank <= k)
        rule, fixed_note = f"top {k}", f"rule top {k} keeps ranks 1-{k}"
    elif fraction is not None:
        f = float(fraction)
        if isinstance(fraction, bool) or not (0.0 < f <= 1.0):
            raise ValueError(f"fraction must be in (0, 1], got {fraction!r}.")
        chosen = known & (np.nan_to_num(scores, nan=-1.0) >= f)
        rule, fixed_note = f"fraction {f:g}", f"below fraction {f:g} of the largest"
    else:
        if isinstance(keep, str):
            keep = [keep]
        unknown = [k for k in keep if k not in names]
        if unknown:
            raise ValueError(f"keep names unknown parameters {unknown!r}; allowed names are {list(names)!r}.")
        chosen = np.array([nm in set(keep) for nm in names])
        rule, fixed_note = "named list", "not in the named list"

    reasons: dict[str, str] = {}
    for i, nm in enumerate(names):
        if scores is None:
            numbers_ = "no screening numbers"
        elif not known[i]:
            numbers_ = "no usable effect (every run around it failed)"
        else:
            j = driver[i]
            numbers_ = (
                f"score {scores[i]:.3g} (rank {rank[i]} of {known.sum()}; {measure} {raw[i, j]:.3g} on {out_names[j]}, "
                f"whose largest is {np.nanmax(raw[:, j]):.3g})"
            )
        if scores is not None and not known[i] and rule != "named list":
            chosen[i] = True
            reasons[nm] = f"selected: {numbers_}; kept rather than fixed unseen"
        elif chosen[i]:
            reasons[nm] = f"selected: {numbers_}; " + ("named in the list" if rule == "named list" else f"rule {rule}")
        else:
            reasons[nm] = f"fixed: {numbers_}; {fixed_note}"
    return Selection(
        selected=tuple(nm for nm, c in zip(names, chosen, strict=True) if c),
        fixed=tuple(nm for nm, c in zip(names, chosen, strict=True) if not c),
        reasons=reasons,
        scores=scores,
        rule=rule,
    )

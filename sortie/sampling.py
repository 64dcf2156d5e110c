"""Initial designs for a campaign: space-filling samples and classical designed experiments.

Two families live here.

* **Unit samplers** return points in the unit cube ``[0, 1]^n_dims``:
  :func:`latin_hypercube`, :func:`sobol`, :func:`full_factorial` and :func:`one_at_a_time`.
  Mapping them to physical units is the job of the design space, not of this module.
* **Coded designs** return points in coded units, where ``0`` is the centre of the region and
  ``±1`` the factorial levels: :func:`fractional_factorial` and :func:`central_composite`.
  :func:`coded_to_unit` maps them to the unit cube.

Every sampler returns a float array of shape ``(n_points, n_dims)``. The random samplers are
deterministic for a given ``seed``: scipy.stats.qmc does the drawing, and the seed is passed to
its engines unchanged (``rng=seed``, SciPy >= 1.15).

References
----------
.. [1] M. D. McKay, R. J. Beckman and W. J. Conover, "A comparison of three methods for
   selecting values of input variables in the analysis of output from a computer code",
   Technometrics 21(2):239-245, 1979.
.. [2] I. M. Sobol', "On the distribution of points in a cube and the approximate evaluation
   of integrals", USSR Comput. Math. Math. Phys. 7(4):86-112, 1967.
.. [3] G. E. P. Box and K. B. Wilson, "On the experimental attainment of optimum conditions",
   J. R. Stat. Soc. B 13(1):1-45, 1951.
.. [4] G. E. P. Box and J. S. Hunter, "Multi-factor experimental designs for exploring
   response surfaces", Ann. Math. Stat. 28(1):195-241, 1957.
.. [5] D. C. Montgomery, *Design and Analysis of Experiments*, Wiley (chapters on two-level
   factorial, fractional factorial and response-surface designs).
"""

from __future__ import annotations

import itertools
import math
import numbers
import warnings
from collections.abc import Sequence
from typing import Literal

import numpy as np

__all__ = [
    "SamplingWarning",
    "central_composite",
    "coded_to_unit",
    "design_resolution",
    "fractional_factorial",
    "full_factorial",
    "latin_hypercube",
    "n_quadratic_terms",
    "one_at_a_time",
    "rotatable_alpha",
    "sobol",
]

Seed = int | np.random.Generator | None

_LHS_OPTIMIZATIONS = (None, "random-cd", "lloyd")
_CCD_VARIANTS = ("circumscribed", "face", "inscribed")
_CCD_FRACTIONS = (None, "half")
# Largest dimension for which scipy ships Joe-Kuo direction numbers.
_SOBOL_MAX_DIMS = 21201


class SamplingWarning(UserWarning):
    """A design was drawn, but it lacks a property the caller probably expects."""


# --------------------------------------------------------------------------- validation


def _check_int(name: str, value: object, minimum: int = 1) -> int:
    """Return ``value`` as an ``int`` if it is an integer >= ``minimum``; raise otherwise."""
    if isinstance(value, bool) or not isinstance(value, numbers.Integral) or value < minimum:
        allowed = "a positive integer" if minimum == 1 else f"an integer >= {minimum}"
        raise ValueError(f"{name} must be {allowed}, got {value!r}")
    return int(value)


def _check_seed(seed: object) -> None:
    if seed is None or isinstance(seed, np.random.Generator):
        return
    if isinstance(seed, bool) or not isinstance(seed, numbers.Integral) or seed < 0:
        raise ValueError(
            f"seed must be a non-negative integer, a numpy Generator or None, got {seed!r}"
        )


def _check_choice(name: str, value: object, allowed: tuple[object, ...]) -> None:
    if value not in allowed:
        raise ValueError(f"{name} must be one of {list(allowed)!r}, got {value!r}")


def _two_level_full(n_dims: int) -> np.ndarray:
    """Full 2^n_dims factorial in coded ±1 units, standard (Yates) order.

    Column 0 alternates fastest, as in Montgomery's standard order [5]_.
    """
    return 2.0 * full_factorial([2] * n_dims) - 1.0


# --------------------------------------------------------------------------- space filling


def latin_hypercube(
    n_points: int,
    n_dims: int,
    *,
    seed: Seed,
    optimization: Literal["random-cd", "lloyd"] | None = None,
) -> np.ndarray:
    """Draw a scrambled Latin hypercube sample in the unit cube.

    Parameters
    ----------
    n_points : int
        Number of points, >= 1.
    n_dims : int
        Number of dimensions, >= 1.
    seed : int, numpy.random.Generator or None
        Passed unchanged to ``scipy.stats.qmc.LatinHypercube(rng=seed)``. The same integer
        seed and arguments give the same points.
    optimization : {None, "random-cd", "lloyd"}, default None
        Post-processing by scipy. ``"random-cd"`` swaps coordinates within columns to lower
        the centred discrepancy and keeps the Latin property; ``"lloyd"`` moves points
        towards a centroidal tessellation and does *not* keep one point per stratum.

    Returns
    -------
    ndarray of shape (n_points, n_dims)
        Points in ``[0, 1)^n_dims``. Without ``"lloyd"``, each column has exactly one point in
        every interval ``[j/n_points, (j+1)/n_points)``.

    Raises
    ------
    ValueError
        If an argument is outside the allowed values.

    Notes
    -----
    Each one-dimensional marginal is split into ``n_points`` equal strata and each stratum
    holds one point, placed uniformly at random inside it ("scramble" on); the strata are
    paired across dimensions by independent random permutations [1]_.

    References
    ----------
    .. [1] M. D. McKay, R. J. Beckman and W. J. Conover, Technometrics 21(2):239-245, 1979.

    Examples
    --------
    >>> x = latin_hypercube(10, 3, seed=0)
    >>> x.shape
    (10, 3)
    """
    n_points = _check_int("n_points", n_points)
    n_dims = _check_int("n_dims", n_dims)
    _check_seed(seed)
    _check_choice("optimization", optimization, _LHS_OPTIMIZATIONS)
    from scipy.stats import qmc  # imported here: scipy.stats takes half a second, `sortie status` never draws

    engine = qmc.LatinHypercube(d=n_dims, scramble=True, optimization=optimization, rng=seed)
    return np.asarray(engine.random(n_points), dtype=float)


def sobol(n_points: int, n_dims: int, *, seed: Seed) -> np.ndarray:
    """Draw the first points of a scrambled Sobol' sequence in the unit cube.

    Parameters
    ----------
    n_points : int
        Number of points, >= 1. A power of two keeps the balance properties of the sequence.
    n_dims : int
        Number of dimensions, 1 to 21201 (the direction numbers shipped with scipy).
    seed : int, numpy.random.Generator or None
        Passed unchanged to ``scipy.stats.qmc.Sobol(rng=seed)``; it drives the scrambling.

    Returns
    -------
    ndarray of shape (n_points, n_dims)
        Points in ``[0, 1)^n_dims``. They equal the first ``n_points`` rows that scipy's own
        scrambled engine gives for the same seed.

    Raises
    ------
    ValueError
        If an argument is outside the allowed values.

    Warns
    -----
    SamplingWarning
        If ``n_points`` is not a power of two. The next power of two is drawn with
        ``random_base2`` and truncated, so the result is still reproducible, but the
        truncated set is no longer a balanced (0, m, d)-net.

    Notes
    -----
    Sobol' points are a base-2 digital sequence [2]_; every block of ``2^m`` consecutive
    points from the start is stratified over all dyadic boxes of volume ``2^-m`` that the
    sequence's quality parameter allows. scipy scrambles with a linear matrix scramble and a
    digital shift; without scrambling the first point is the origin.

    References
    ----------
    .. [2] I. M. Sobol', USSR Comput. Math. Math. Phys. 7(4):86-112, 1967.

    Examples
    --------
    >>> sobol(8, 2, seed=0).shape
    (8, 2)
    """
    n_points = _check_int("n_points", n_points)
    n_dims = _check_int("n_dims", n_dims)
    if n_dims > _SOBOL_MAX_DIMS:
        raise ValueError(f"n_dims must be at most {_SOBOL_MAX_DIMS} for Sobol', got {n_dims}")
    _check_seed(seed)
    m = (n_points - 1).bit_length()  # smallest m with 2**m >= n_points
    if 2**m != n_points:
        lower, upper = 2 ** (m - 1), 2**m
        warnings.warn(
            f"n_points={n_points} is not a power of two, so the Sobol' balance properties are "
            f"lost; the nearest powers of two are {lower} and {upper}.",
            SamplingWarning,
            stacklevel=2,
        )
    from scipy.stats import qmc

    engine = qmc.Sobol(d=n_dims, scramble=True, rng=seed)
    return np.asarray(engine.random_base2(m)[:n_points], dtype=float)


# --------------------------------------------------------------------------- factorial designs


def full_factorial(levels: Sequence[int]) -> np.ndarray:
    """Every combination of evenly spaced levels, in the unit cube.

    Parameters
    ----------
    levels : sequence of int, length n_dims
        Number of levels of each factor, each >= 1. Level ``j`` of a factor with ``L >= 2``
        levels sits at ``j / (L - 1)``; a factor with one level sits at 0.5.

    Returns
    -------
    ndarray of shape (prod(levels), n_dims)
        Points in ``[0, 1]^n_dims`` in standard (Yates) order: the first column changes
        fastest.

    Raises
    ------
    ValueError
        If ``levels`` is empty or holds anything but positive integers.

    References
    ----------
    .. [5] D. C. Montgomery, *Design and Analysis of Experiments*, Wiley.

    Examples
    --------
    >>> full_factorial([2, 3]).shape
    (6, 2)
    """
    if isinstance(levels, str | bytes) or not isinstance(levels, Sequence | np.ndarray):
        raise ValueError(
            f"levels must be a non-empty sequence of positive integers, got {levels!r}"
        )
    if len(levels) == 0:
        raise ValueError("levels must be a non-empty sequence of positive integers, got []")
    counts = [_check_int(f"levels[{i}]", lv) for i, lv in enumerate(levels)]
    # np.indices varies its last axis fastest; reverse twice so column 0 varies fastest.
    index = np.indices(counts[::-1]).reshape(len(counts), -1)[::-1].T.astype(float)
    scale = np.array([c - 1 if c > 1 else 1 for c in counts], dtype=float)
    unit = index / scale
    unit[:, [i for i, c in enumerate(counts) if c == 1]] = 0.5
    return unit


def fractional_factorial(n_dims: int) -> np.ndarray:
    """Half fraction 2^(k-1) of a two-level factorial, in coded ±1 units.

    The fraction is the principal one, with defining relation ``I = AB...K`` (the product of
    all ``k`` columns is +1 in every run), so its resolution is ``k``: a main effect is aliased
    only with a (k-1)-factor interaction, and for ``k = 5`` the 16 runs form a resolution V
    design in which no main effect or two-factor interaction is aliased with another.

    Parameters
    ----------
    n_dims : int
        Number of factors ``k``, >= 3 (with two factors a half fraction aliases the two main
        effects with each other).

    Returns
    -------
    ndarray of shape (2**(n_dims - 1), n_dims)
        Coded points with entries -1.0 or +1.0. The first ``k - 1`` columns are a full
        factorial in standard order and the last column is their product.

    Raises
    ------
    ValueError
        If ``n_dims`` is not an integer >= 3.

    See Also
    --------
    design_resolution : resolution of a regular two-level design.

    References
    ----------
    .. [4] G. E. P. Box and J. S. Hunter, Ann. Math. Stat. 28(1):195-241, 1957.
    .. [5] D. C. Montgomery, *Design and Analysis of Experiments*, Wiley.

    Examples
    --------
    >>> fractional_factorial(5).shape
    (16, 5)
    """
    n_dims = _check_int("n_dims", n_dims, minimum=3)
    base = _two_level_full(n_dims - 1)
    generator = np.prod(base, axis=1, keepdims=True)  # K = AB...J, hence I = AB...K
    return np.hstack([base, generator])


def design_resolution(coded: np.ndarray) -> float:
    """Resolution of a regular two-level design: the length of its shortest defining word.

    A word is a set of columns whose elementwise product is constant (+1 or -1) over all
    runs. Works for regular fractions such as :func:`fractional_factorial`; non-regular
    designs (partial aliasing) are outside its scope.

    Parameters
    ----------
    coded : array-like of shape (n_points, n_dims)
        Design with every entry -1 or +1.

    Returns
    -------
    float
        The smallest word length as a whole number, or ``math.inf`` if no product of columns
        is constant (a full factorial, possibly replicated).

    Raises
    ------
    ValueError
        If ``coded`` is not a 2-D array of ±1 entries.

    References
    ----------
    .. [5] D. C. Montgomery, *Design and Analysis of Experiments*, Wiley.
    """
    x = np.asarray(coded, dtype=float)
    if x.ndim != 2 or x.size == 0 or not np.all(np.abs(x) == 1.0):
        raise ValueError("coded must be a non-empty 2-D array whose entries are all -1 or +1")
    n_dims = x.shape[1]
    for length in range(1, n_dims + 1):
        for word in itertools.combinations(range(n_dims), length):
            product = np.prod(x[:, word], axis=1)
            if np.all(product == product[0]):
                return length
    return math.inf


def n_quadratic_terms(n_dims: int) -> int:
    """Number of coefficients of a full quadratic model in ``n_dims`` variables.

    Parameters
    ----------
    n_dims : int
        Number of variables ``k``, >= 1.

    Returns
    -------
    int
        ``(k + 1)(k + 2) / 2``: one intercept, ``k`` linear, ``k`` pure quadratic and
        ``k(k - 1)/2`` two-factor interaction terms. A quadratic response surface needs at
        least this many distinct runs.

    References
    ----------
    .. [3] G. E. P. Box and K. B. Wilson, J. R. Stat. Soc. B 13(1):1-45, 1951.
    """
    k = _check_int("n_dims", n_dims)
    return (k + 1) * (k + 2) // 2


# --------------------------------------------------------------------------- central composite


def rotatable_alpha(n_factorial: int) -> float:
    """Axial distance that makes a central composite design rotatable.

    Parameters
    ----------
    n_factorial : int
        Number of factorial (cube) points ``n_F``, >= 1.

    Returns
    -------
    float
        ``n_F ** (1/4)``. With it the pure fourth moment of the design is three times the
        mixed fourth moment, so the prediction variance depends only on the distance from
        the centre [4]_.

    References
    ----------
    .. [4] G. E. P. Box and J. S. Hunter, Ann. Math. Stat. 28(1):195-241, 1957.
    """
    n_factorial = _check_int("n_factorial", n_factorial)
    return float(n_factorial) ** 0.25


def central_composite(
    n_dims: int,
    *,
    variant: Literal["circumscribed", "face", "inscribed"] = "circumscribed",
    center_points: int = 1,
    fraction: Literal["half"] | None = None,
) -> np.ndarray:
    """Central composite design in coded units.

    The design stacks, in this order, the factorial (cube) points, the ``2 * n_dims`` axial
    (star) points ``-a e_i, +a e_i`` for ``i = 0 .. n_dims-1``, and ``center_points``
    copies of the origin.

    Parameters
    ----------
    n_dims : int
        Number of factors ``k``, >= 2.
    variant : {"circumscribed", "face", "inscribed"}, default "circumscribed"
        ``"circumscribed"``: factorial points at ±1, axial points at ±α with the rotatable
        ``α = n_F ** (1/4)`` (see :func:`rotatable_alpha`). ``"face"``: α = 1, so every
        factor takes the three levels -1, 0, +1. ``"inscribed"``: the circumscribed design
        divided by α, so axial points sit at ±1 and factorial points at ±1/α; it stays
        rotatable.
    center_points : int, default 1
        Number of centre runs, >= 0. They only matter when the solver output is noisy; for a
        deterministic CFD code one is enough.
    fraction : {None, "half"}, default None
        ``None`` uses the full 2^k factorial core. ``"half"`` uses the resolution-k half
        fraction of :func:`fractional_factorial`, which needs ``k >= 5`` so that the core
        has resolution V or higher and all two-factor interactions stay estimable.

    Returns
    -------
    ndarray of shape (n_F + 2 * n_dims + center_points, n_dims)
        Coded points, where ``n_F`` is ``2**k`` or ``2**(k-1)``. Use :func:`coded_to_unit`
        to map them into the unit cube.

    Raises
    ------
    ValueError
        If an argument is outside the allowed values.

    Notes
    -----
    The design was introduced for sequential response-surface work [3]_ and its rotatable
    form by [4]_; run counts and axial distances for k = 2..6 are tabulated in [5]_.

    References
    ----------
    .. [3] G. E. P. Box and K. B. Wilson, J. R. Stat. Soc. B 13(1):1-45, 1951.
    .. [4] G. E. P. Box and J. S. Hunter, Ann. Math. Stat. 28(1):195-241, 1957.
    .. [5] D. C. Montgomery, *Design and Analysis of Experiments*, Wiley.

    Examples
    --------
    >>> central_composite(3).shape
    (15, 3)
    >>> central_composite(5, fraction="half", center_points=0).shape
    (26, 5)
    """
    n_dims = _check_int("n_dims", n_dims, minimum=2)
    _check_choice("variant", variant, _CCD_VARIANTS)
    center_points = _check_int("center_points", center_points, minimum=0)
    _check_choice("fraction", fraction, _CCD_FRACTIONS)
    if fraction == "half":
        if n_dims < 5:
            raise ValueError(
                f"n_dims must be at least 5 with fraction='half' (so the factorial core has "
                f"resolution V or higher), got {n_dims}"
            )
        cube = fractional_factorial(n_dims)
    else:
        cube = _two_level_full(n_dims)

    alpha = 1.0 if variant == "face" else rotatable_alpha(cube.shape[0])
    axial = np.zeros((2 * n_dims, n_dims))
    for i in range(n_dims):
        axial[2 * i, i] = -alpha
        axial[2 * i + 1, i] = alpha
    design = np.vstack([cube, axial, np.zeros((center_points, n_dims))])
    if variant == "inscribed":
        design /= alpha
    return design


def coded_to_unit(coded: np.ndarray) -> np.ndarray:
    """Map a coded design into the unit cube with its outermost points on the bounds.

    ``u = 0.5 + x / (2 * max|x|)``, where ``max|x|`` is the largest coordinate magnitude in
    the whole design (one scale for all dimensions, so the design keeps its shape).

    Design bounds in sortie are hard limits (the solver or the geometry kernel cannot go
    beyond them), so the outermost points are placed *on* the bounds rather than outside
    them. For a circumscribed CCD this puts the axial points on the faces of the cube and
    shrinks the factorial points to ``0.5 ± 1/(2α)``, the same geometry as the inscribed
    design.

    Parameters
    ----------
    coded : array-like of shape (n_points, n_dims)
        Finite coded points centred on 0.

    Returns
    -------
    ndarray of shape (n_points, n_dims)
        Points in ``[0, 1]^n_dims``. A design made only of centre points maps to 0.5.

    Raises
    ------
    ValueError
        If ``coded`` is not a non-empty finite 2-D array.
    """
    x = np.asarray(coded, dtype=float)
    if x.ndim != 2 or x.size == 0:
        raise ValueError(f"coded must be a non-empty 2-D array, got shape {x.shape}")
    if not np.all(np.isfinite(x)):
        raise ValueError("coded must contain only finite values, got NaN or infinity")
    radius = float(np.max(np.abs(x)))
    if radius == 0.0:
        return np.full_like(x, 0.5)
    return 0.5 + x / (2.0 * radius)


# --------------------------------------------------------------------------- screening


def one_at_a_time(baseline_unit: np.ndarray, levels: int) -> np.ndarray:
    """One-factor-at-a-time sweeps through a baseline point, in the unit cube.

    Parameters
    ----------
    baseline_unit : array-like of shape (n_dims,)
        Baseline point in ``[0, 1]^n_dims``.
    levels : int
        Number of evenly spaced values over ``[0, 1]`` (both ends included) per sweep, >= 2.

    Returns
    -------
    ndarray of shape (1 + n_dims * levels - n_duplicates, n_dims)
        The baseline first, then for each dimension in turn the ``levels`` sweep values with
        the other coordinates at baseline. A sweep value equal to the baseline coordinate
        (within 1e-12) would repeat the baseline and is skipped, so ``n_duplicates`` counts
        the baseline coordinates that fall on the sweep grid. Each row after the first
        differs from the baseline in exactly one coordinate.

    Raises
    ------
    ValueError
        If ``baseline_unit`` is not a finite 1-D array in ``[0, 1]`` or ``levels`` < 2.

    Notes
    -----
    One-at-a-time sweeps show main effects only and confound interactions with the
    baseline choice; see the discussion of best-guess and one-factor-at-a-time strategies
    in [5]_. They remain the cheapest first look at a new parameterisation.

    References
    ----------
    .. [5] D. C. Montgomery, *Design and Analysis of Experiments*, Wiley.

    Examples
    --------
    >>> one_at_a_time([0.5, 0.5], levels=3).shape
    (5, 2)
    """
    base = np.asarray(baseline_unit, dtype=float)
    if base.ndim != 1 or base.size == 0:
        raise ValueError(
            f"baseline_unit must be a non-empty 1-D array of shape (n_dims,), got shape "
            f"{base.shape}"
        )
    if not np.all(np.isfinite(base)) or np.any(base < 0.0) or np.any(base > 1.0):
        raise ValueError(f"baseline_unit must lie in the unit cube [0, 1], got {base.tolist()!r}")
    levels = _check_int("levels", levels, minimum=2)
    grid = np.linspace(0.0, 1.0, levels)
    rows = [base.copy()]
    for i, b in enumerate(base):
        for value in grid:
            if abs(value - b) <= 1e-12:
                continue
            point = base.copy()
            point[i] = value
            rows.append(point)
    return np.vstack(rows)

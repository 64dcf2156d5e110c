"""Invented analytic aerodynamics of a rocket-sled aft body on a test track.

The model is deliberately cheap but built from published compressible-flow rules so that the
numbers behave like a real transonic campaign: a subsonic underbody suction (downforce) that grows
with the Prandtl–Glauert factor, a shock that appears transonically and unloads the underbody into
positive lift, a Lock-style drag rise past a Korn-type critical Mach number, and Ackeret-type
supersonic wave drag. Each published rule is its own function so the tests can hold it against
the check values in ``CHECKS.md`` §7 independently of the invented parts.

Everything here is pure and deterministic. The internal helpers accept numpy arrays as well as
floats so that a parameter scan over tens of thousands of designs takes milliseconds; the public
entry point :func:`evaluate` takes one design and returns plain floats.
"""

from __future__ import annotations

import math
from typing import Final

import numpy as np
from numpy.typing import ArrayLike, NDArray

#: Ratio of specific heats for air; every published rule below assumes it.
GAMMA: Final[float] = 1.4

#: Deck keys the physics reads, in a fixed order (the order also defines the random-stream hash).
ACTIVE_PARAMETERS: Final[tuple[str, ...]] = (
    "ramp_angle",
    "boattail_length",
    "diffuser_angle",
    "strut_thickness",
    "skirt_gap",
    "fin_count",
)

#: Design box (lower, upper) in deck units: degrees for angles, metres for lengths.
BOUNDS: Final[dict[str, tuple[float, float]]] = {
    "ramp_angle": (2.0, 14.0),
    "boattail_length": (0.3, 1.2),
    "diffuser_angle": (0.0, 12.0),
    "strut_thickness": (0.02, 0.10),
    "skirt_gap": (0.01, 0.06),
    "fin_count": (2.0, 4.0),
}

#: The current (baseline) aft body that every candidate is compared with.
BASELINE: Final[dict[str, float]] = {
    "ramp_angle": 8.0,
    "boattail_length": 0.7,
    "diffuser_angle": 6.0,
    "strut_thickness": 0.06,
    "skirt_gap": 0.03,
    "fin_count": 3.0,
}

#: Allowed values of the one integer parameter.
FIN_COUNTS: Final[tuple[int, ...]] = (2, 3, 4)

#: Mach range the model is calibrated for; outside it the solver refuses the case.
MACH_RANGE: Final[tuple[float, float]] = (0.3, 2.0)

#: Invented strut chord (m); strut_thickness / STRUT_CHORD is the thickness ratio t/c.
STRUT_CHORD: Final[float] = 0.5

#: Mach numbers the campaign samples; used by :func:`lift_swing` and the tests.
SWING_MACHS: Final[tuple[float, ...]] = (0.6, 0.9, 1.1, 1.3)

# Compressibility bridge: Prandtl–Glauert up to _M_LO, Ackeret-type from _M_HI, cubic between.
_M_LO: Final[float] = 0.8
_M_HI: Final[float] = 1.2

Float = float | NDArray[np.float64]


# --------------------------------------------------------------------------------------------
# Published rules (CHECKS.md §7)
# --------------------------------------------------------------------------------------------


def prandtl_glauert(mach: ArrayLike) -> Float:
    """Prandtl–Glauert factor 1/√(1 − M²) for subsonic Mach (Glauert 1928).

    Multiplies incompressible pressure and lift coefficients. Singular at M = 1, which is why the
    solver itself uses :func:`compressibility_factor` instead.
    """
    m = np.asarray(mach, dtype=float)
    if np.any(m >= 1.0) or np.any(m < 0.0):
        raise ValueError("prandtl_glauert is defined for 0 <= M < 1 only")
    return _scalar_or_array(1.0 / np.sqrt(1.0 - m * m))


def ackeret(mach: ArrayLike) -> Float:
    """Ackeret factor 1/√(M² − 1) for supersonic Mach (Ackeret 1925).

    The supersonic thin-airfoil lift slope is 4 times this (see :func:`ackeret_lift_slope`).
    """
    m = np.asarray(mach, dtype=float)
    if np.any(m <= 1.0):
        raise ValueError("ackeret is defined for M > 1 only")
    return _scalar_or_array(1.0 / np.sqrt(m * m - 1.0))


def ackeret_lift_slope(mach: ArrayLike) -> Float:
    """Supersonic thin-airfoil lift slope dc_l/dα = 4/√(M² − 1) per radian."""
    return _scalar_or_array(4.0 * np.asarray(ackeret(mach)))


def karman_tsien(cp0: ArrayLike, mach: ArrayLike) -> Float:
    """Kármán–Tsien compressible pressure coefficient from the incompressible one.

    Cp = Cp0 / [β + M²/(1 + β) · Cp0/2] with β = √(1 − M²). Better than Prandtl–Glauert for the
    strong suction peaks that drive the underbody downforce.
    """
    c = np.asarray(cp0, dtype=float)
    m = np.asarray(mach, dtype=float)
    if np.any(m >= 1.0) or np.any(m < 0.0):
        raise ValueError("karman_tsien is defined for 0 <= M < 1 only")
    beta = np.sqrt(1.0 - m * m)
    return _scalar_or_array(c / (beta + (m * m / (1.0 + beta)) * c / 2.0))


def critical_cp(mach: ArrayLike) -> Float:
    """Critical pressure coefficient Cp*: where the local flow just reaches sonic speed.

    Cp* = 2/(γM²) · {[(2 + (γ−1)M²)/(γ+1)]^(γ/(γ−1)) − 1}, zero at M = 1.
    """
    m = np.asarray(mach, dtype=float)
    if np.any(m <= 0.0):
        raise ValueError("critical_cp is defined for M > 0 only")
    g = GAMMA
    ratio = (2.0 + (g - 1.0) * m * m) / (g + 1.0)
    return _scalar_or_array(2.0 / (g * m * m) * (ratio ** (g / (g - 1.0)) - 1.0))


def lock_drag_rise(mach: ArrayLike, mach_crit: ArrayLike) -> Float:
    """Lock's fourth-power wave-drag rise ΔC_D = 20 (M − M_crit)⁴ above M_crit, zero below."""
    m = np.asarray(mach, dtype=float)
    mc = np.asarray(mach_crit, dtype=float)
    excess = np.maximum(m - mc, 0.0)
    return _scalar_or_array(20.0 * excess**4)


def korn_drag_divergence(thickness_ratio: ArrayLike, lift: ArrayLike, kappa: float = 0.95) -> Float:
    """Korn equation for an unswept section: M_DD = κ − t/c − c_l/10.

    κ = 0.95 is the supercritical-section technology factor. With Lock's rise the critical Mach is
    M_DD − (0.1/80)^(1/3), which :func:`critical_mach` applies.
    """
    t = np.asarray(thickness_ratio, dtype=float)
    cl = np.asarray(lift, dtype=float)
    return _scalar_or_array(kappa - t - cl / 10.0)


def critical_mach(thickness_ratio: ArrayLike, lift: ArrayLike) -> Float:
    """Critical Mach consistent with Korn + Lock: M_DD minus the 0.1077 offset where dC_D/dM = 0.1."""
    offset = (0.1 / 80.0) ** (1.0 / 3.0)
    return _scalar_or_array(np.asarray(korn_drag_divergence(thickness_ratio, lift)) - offset)


# --------------------------------------------------------------------------------------------
# Smooth transonic bridge (invented, but built from the two published limits)
# --------------------------------------------------------------------------------------------


def _pg_value_slope(m: float) -> tuple[float, float]:
    beta2 = 1.0 - m * m
    return 1.0 / math.sqrt(beta2), m / beta2**1.5


def _ack_value_slope(m: float) -> tuple[float, float]:
    # Ackeret lift slope relative to the incompressible 2π, so both branches scale the same thing.
    k = 4.0 / (2.0 * math.pi)
    mu2 = m * m - 1.0
    return k / math.sqrt(mu2), -k * m / mu2**1.5


def compressibility_factor(mach: ArrayLike) -> Float:
    """Lift-slope compressibility factor, finite at every Mach.

    Below M 0.8 it is the Prandtl–Glauert factor; above M 1.2 it is the Ackeret lift slope divided
    by the incompressible 2π (so both branches mean "lift slope relative to incompressible"). A
    cubic Hermite between them matches value and slope at both ends, removing the M = 1 singularity
    that neither linear theory can describe. The result is C¹ everywhere.
    """
    m_in = np.asarray(mach, dtype=float)
    m = np.atleast_1d(m_in)
    out = np.empty_like(m)
    lo = m <= _M_LO
    hi = m >= _M_HI
    mid = ~(lo | hi)
    out[lo] = 1.0 / np.sqrt(1.0 - m[lo] ** 2)
    out[hi] = (2.0 / math.pi) / np.sqrt(m[hi] ** 2 - 1.0)
    if np.any(mid):
        p0, d0 = _pg_value_slope(_M_LO)
        p1, d1 = _ack_value_slope(_M_HI)
        h = _M_HI - _M_LO
        t = (m[mid] - _M_LO) / h
        h00 = 2 * t**3 - 3 * t**2 + 1
        h10 = t**3 - 2 * t**2 + t
        h01 = -2 * t**3 + 3 * t**2
        h11 = t**3 - t**2
        out[mid] = h00 * p0 + h10 * h * d0 + h01 * p1 + h11 * h * d1
    return _scalar_or_array(out.reshape(m_in.shape))


def _logistic(x: NDArray[np.float64]) -> NDArray[np.float64]:
    # Numerically safe logistic: avoids overflow warnings for large |x|.
    return 0.5 * (1.0 + np.tanh(0.5 * x))


# --------------------------------------------------------------------------------------------
# Invented sled aft-body model
# --------------------------------------------------------------------------------------------

# Every coefficient below is invented; the comments say what each one is meant to produce.
_SUCTION_SCALE = 0.16  # incompressible underbody downforce at the baseline, order of magnitude
_SHOCK_WIDTH = 0.035  # Mach width of the transonic shock onset
_SHOCK_LIFT = 0.95  # positive lift once the shock has unloaded the underbody
_EXPANSION = 1.6  # supersonic ramp expansion (Ackeret-type), pulls lift back down


def shock_onset_mach(ramp_angle: ArrayLike, boattail_length: ArrayLike) -> Float:
    """Mach at which the aft shock forms: earlier for a steeper ramp or a shorter boattail."""
    r = np.asarray(ramp_angle, dtype=float)
    b = np.asarray(boattail_length, dtype=float)
    return _scalar_or_array(0.98 - 0.010 * (r - 8.0) + 0.12 * (b - 0.7))


def _suction(r, b, d, tc, g):  # type: ignore[no-untyped-def]
    """Incompressible underbody downforce magnitude (positive number)."""
    diffuser = 1.0 + 0.09 * d
    upsweep = 1.0 + 0.04 * r
    sealing = 2.5 * np.tanh(np.exp(-(g - 0.03) / 0.012) / 2.5)
    blockage = 1.0 - 1.5 * (tc - 0.12)
    length = b / 0.7
    return _SUCTION_SCALE * diffuser * upsweep * sealing * blockage * length


def diffuser_match_angle(ramp_angle: ArrayLike, boattail_length: ArrayLike) -> Float:
    """Diffuser angle (deg) that parks the terminal shock at the diffuser exit.

    A steeper ramp turns the flow more, so the diffuser must open more to match it; a longer
    boattail spreads the turning and needs less. Away from this angle the shock moves onto the
    ramp or into the throat and unloads more of the underbody.
    """
    r = np.asarray(ramp_angle, dtype=float)
    b = np.asarray(boattail_length, dtype=float)
    return _scalar_or_array(8.5 + 0.35 * (r - 8.0) - 2.0 * (b - 0.7))


def _lift(r, b, d, tc, g, n, m):  # type: ignore[no-untyped-def]
    cf = compressibility_factor(m)
    onset = shock_onset_mach(r, b)
    sig = _logistic((m - onset) / _SHOCK_WIDTH)
    suction = -_suction(r, b, d, tc, g) * cf * (1.0 - 0.8 * sig)
    mismatch = (d - diffuser_match_angle(r, b)) / 4.0
    shock = (
        _SHOCK_LIFT
        * (0.3 + 1.2 * mismatch**2 / (1.0 + 0.2 * mismatch**2))
        * (0.1 + 0.9 * g / 0.03)
        * (0.78 + 0.154 / b)
        * (1.0 + 25.0 * (tc - 0.12) ** 2)
        * (1.0 - 0.10 * (n - 3.0))
    )
    rr = np.radians(r)
    expansion = _EXPANSION * rr * np.exp(-0.5 * (r / 11.0) ** 2) * cf
    return suction + sig * (shock - expansion)


def _drag(r, b, d, tc, g, n, m):  # type: ignore[no-untyped-def]
    cf = compressibility_factor(m)
    sonic = _logistic((m - 1.0) / 0.05)
    friction = (0.060 + 0.03 * (b - 0.7)) * (1.0 - 0.05 * (m - 0.3))
    base = (
        0.10
        * (1.0 + 1.0 * sonic)
        * (0.7 / b) ** 0.5
        * (1.0 + 0.03 * (r - 8.0))
        * (1.0 - 0.05 * (d - 6.0) + 0.002 * (d - 6.0) ** 2)
    )
    mcrit = critical_mach(0.06 + 0.5 * tc, _suction(r, b, d, tc, g))
    rise_cap = 0.25
    rise = rise_cap * np.tanh(np.asarray(lock_drag_rise(m, mcrit)) / rise_cap)
    ackeret_like = (math.pi / 2.0) * cf  # = 1/sqrt(M^2-1) above M 1.2, finite below
    wave = sonic * 4.0 * ackeret_like * ((2.0 / 3.0) * tc**2 * 0.6 + 0.2 * np.radians(r) ** 2)
    fins = n * (0.008 + 0.02 * sonic * cf)
    spill = 1.5 * (g - 0.03) * sonic
    struts = 0.3 * tc**2
    return friction + base + rise + wave + fins + spill + struts


def forces(
    params: dict[str, ArrayLike], mach: ArrayLike
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Vectorised (lift, drag) for arrays of designs; used by scans and by :func:`evaluate`."""
    r = np.asarray(params["ramp_angle"], dtype=float)
    b = np.asarray(params["boattail_length"], dtype=float)
    d = np.asarray(params["diffuser_angle"], dtype=float)
    tc = np.asarray(params["strut_thickness"], dtype=float) / STRUT_CHORD
    g = np.asarray(params["skirt_gap"], dtype=float)
    n = np.asarray(params["fin_count"], dtype=float)
    m = np.asarray(mach, dtype=float)
    return _lift(r, b, d, tc, g, n, m), _drag(r, b, d, tc, g, n, m)


def evaluate(params: dict[str, float], mach: float) -> dict[str, float]:
    """Lift (vertical force coefficient, positive up) and drag coefficient of one design.

    ``params`` must hold every name in :data:`ACTIVE_PARAMETERS`; extra keys are ignored here
    (the command-line front end reports them). Validation of ranges is the caller's job so that
    scans can probe the model freely.
    """
    missing = [k for k in ACTIVE_PARAMETERS if k not in params]
    if missing:
        raise KeyError(f"missing physics parameter(s): {', '.join(missing)}")
    lift, drag = forces({k: float(params[k]) for k in ACTIVE_PARAMETERS}, float(mach))
    return {"lift": float(lift), "drag": float(drag)}


def lift_swing(params: dict[str, ArrayLike], machs: tuple[float, ...] = SWING_MACHS) -> Float:
    """max(lift) − min(lift) over the campaign Mach numbers: the quantity a design tries to shrink."""
    lifts = np.stack([forces(params, m)[0] for m in machs])
    return _scalar_or_array(lifts.max(axis=0) - lifts.min(axis=0))


def _scalar_or_array(x: NDArray[np.float64]) -> Float:
    arr = np.asarray(x, dtype=float)
    return float(arr) if arr.ndim == 0 else arr

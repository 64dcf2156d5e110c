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

#: Deck keys the physics reads (fin_count is an integer, the rest are continuous).
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

#: Physically meaningful limits. Values inside these but outside :data:`BOUNDS` are accepted with
#: a warning (designs such as circumscribed central composites put star points outside the box);
#: values outside them are refused because the model would stop meaning anything.
HARD_LIMITS: Final[dict[str, tuple[float, float]]] = {
    "ramp_angle": (0.0, 20.0),
    "boattail_length": (0.1, 2.0),
    "diffuser_angle": (0.0, 20.0),
    "strut_thickness": (0.005, 0.2),
    "skirt_gap": (0.0, 0.12),
    "fin_count": (2.0, 4.0),
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
    """Prandtl–Glauert factor 1/√(1 − M²) for subsonic Mach (Glauert 1928, from memory).

    Multiplies incompressible pressure and lift coefficients. Singular at M = 1, which is why the
    solver itself uses :func:`compressibility_factor` instead.
    """
    m = np.asarray(mach, dtype=float)
    if np.any(m >= 1.0) or np.any(m < 0.0):
        raise ValueError("prandtl_glauert is defined for 0 <= M < 1 only")
    return _scalar_or_array(1.0 / np.sqrt(1.0 - m * m))


def ackeret(mach: ArrayLike) -> Float:
    """Ackeret factor 1/√(M² − 1) for supersonic Mach (Ackeret 1925, from memory).

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
    """Kármán–Tsien compressible pressure coefficient from the incompressible one (from memory).

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


def karman_tsien_critical_mach(cp0: ArrayLike) -> Float:
    """Free-stream Mach at which a suction peak Cp0 (incompressible) first turns sonic.

    Solves Kármán–Tsien Cp(Cp0, M) = Cp*(M) by bisection. Kármán–Tsien falls monotonically with
    Mach until its denominator vanishes and Cp* rises monotonically, so there is exactly one
    crossing below the singularity; past the singularity the flow is certainly supercritical and
    counts as "above". Needs Cp0 < 0 (a suction peak).
    """
    c = np.asarray(cp0, dtype=float)
    if np.any(c >= 0.0):
        raise ValueError("karman_tsien_critical_mach needs a suction peak, Cp0 < 0")
    lo = np.full(c.shape, 0.05)
    hi = np.full(c.shape, 1.0 - 1e-12)
    for _ in range(60):  # 60 halvings of [0.05, 1) are far below float resolution
        mid = 0.5 * (lo + hi)
        beta = np.sqrt(1.0 - mid * mid)
        denominator = beta + (mid * mid / (1.0 + beta)) * c / 2.0
        cp = np.divide(c, denominator, out=np.full_like(c, -np.inf), where=denominator > 0.0)
        supercritical = cp <= np.asarray(critical_cp(mid))
        hi = np.where(supercritical, mid, hi)
        lo = np.where(supercritical, lo, mid)
    return _scalar_or_array(0.5 * (lo + hi))


def lock_drag_rise(mach: ArrayLike, mach_crit: ArrayLike) -> Float:
    """Lock's fourth-power wave-drag rise ΔC_D = 20 (M − M_crit)⁴ above M_crit, zero below."""
    m = np.asarray(mach, dtype=float)
    mc = np.asarray(mach_crit, dtype=float)
    excess = np.maximum(m - mc, 0.0)
    return _scalar_or_array(20.0 * excess**4)


def korn_drag_divergence(thickness_ratio: ArrayLike, lift: ArrayLike, kappa: float = 0.95) -> Float:
    """Korn equation for an unswept section: M_DD = κ − t/c − c_l/10 (from memory).

    κ = 0.95 is the supercritical-section technology factor. With Lock's rise the critical Mach is
    M_DD − (0.1/80)^(1/3), which :func:`korn_lock_critical_mach` applies.
    """
    t = np.asarray(thickness_ratio, dtype=float)
    cl = np.asarray(lift, dtype=float)
    return _scalar_or_array(kappa - t - cl / 10.0)


def korn_lock_critical_mach(thickness_ratio: ArrayLike, lift: ArrayLike) -> Float:
    """Critical Mach consistent with Korn + Lock: M_DD minus the 0.1077 offset where dC_D/dM = 0.1.

    With Lock's 20 (M − M_crit)⁴ the slope 80 (M − M_crit)³ reaches 0.1 at M_DD, so
    M_crit = M_DD − (0.1/80)^(1/3).
    """
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
#
# Every coefficient below is invented. They were tuned with a 20 000-point uniform scan (plus
# local refinement) so that the demo campaign is worth solving. Over Mach 0.6/0.9/1.1/1.3:
#   * baseline swing max(lift) - min(lift) = 1.00 (downforce -0.48 at M 0.9, lift +0.52 at 1.3);
#   * swing ranges 0.40-9.5 over the box; its minimum (≈0.40, fin_count 3) is interior;
#   * "drag no worse than the baseline at every Mach" keeps ≈29 % of the box, excludes that
#     unconstrained minimum (it pays ≈5 % more drag at M 1.1-1.3), and leaves a constrained
#     minimum of ≈0.42 (42 % of the baseline swing), also interior, also with three fins.
# The trade-offs: swing wants the diffuser matched to the ramp (diffuser_match_angle), a
# moderately open skirt, mid-thickness struts and three fins; drag wants a low ramp, a long
# boattail, thin struts, a tight skirt and two fins.

_SUCTION_SCALE: Final[float] = 0.16  # incompressible underbody downforce scale
_SHOCK_WIDTH: Final[float] = 0.035  # Mach width of the transonic shock onset
_SHOCK_DELAY: Final[float] = 0.257  # Mach from a sonic suction peak to a shock that unloads
_SHOCK_LIFT: Final[float] = 0.95  # positive lift once the shock has unloaded the underbody
_SHOCK_UNLOAD: Final[float] = 0.8  # fraction of the underbody suction the shock destroys
_EXPANSION: Final[float] = 1.6  # supersonic ramp expansion (Ackeret-type), pulls lift down
_RAMP_SEPARATION_DEG: Final[float] = 11.0  # ramp angle where the expanding flow separates
_RISE_CAP: Final[float] = 0.25  # Lock's rise saturates at this drag increment
_SONIC_WIDTH: Final[float] = 0.05  # Mach width of the switch-on of supersonic wave terms


def peak_suction_cp(ramp_angle: ArrayLike, boattail_length: ArrayLike) -> Float:
    """Incompressible pressure coefficient of the suction peak at the ramp shoulder.

    −0.43 at the baseline; a steeper upsweep or a shorter (more abrupt) boattail accelerates the
    underbody flow more and deepens the peak.
    """
    r = np.asarray(ramp_angle, dtype=float)
    b = np.asarray(boattail_length, dtype=float)
    return _scalar_or_array(-0.43 * np.exp(0.055 * (r - 8.0)) * np.sqrt(0.7 / b))


def shock_onset_mach(ramp_angle: ArrayLike, boattail_length: ArrayLike) -> Float:
    """Mach at which the aft shock forms: earlier for a steeper ramp or a shorter boattail.

    The peak turns sonic at the Kármán–Tsien critical Mach of :func:`peak_suction_cp`; the shock
    grows strong enough to unload the underbody a fixed Mach step later.
    """
    cp0 = np.asarray(peak_suction_cp(ramp_angle, boattail_length))
    return _scalar_or_array(np.asarray(karman_tsien_critical_mach(cp0)) + _SHOCK_DELAY)


def diffuser_match_angle(ramp_angle: ArrayLike, boattail_length: ArrayLike) -> Float:
    """Diffuser angle (deg) that parks the terminal shock at the diffuser exit.

    A steeper ramp turns the flow more, so the diffuser must open more to match it; a longer
    boattail spreads the turning and needs less. Away from this angle the shock moves onto the
    ramp or into the throat and unloads more of the underbody.
    """
    r = np.asarray(ramp_angle, dtype=float)
    b = np.asarray(boattail_length, dtype=float)
    return _scalar_or_array(8.5 + 0.35 * (r - 8.0) - 2.0 * (b - 0.7))


def underbody_suction(
    ramp_angle: ArrayLike,
    boattail_length: ArrayLike,
    diffuser_angle: ArrayLike,
    thickness_ratio: ArrayLike,
    skirt_gap: ArrayLike,
) -> Float:
    """Incompressible underbody downforce magnitude (a positive number).

    Grows with the diffuser and ramp angles and the underbody length; the skirt seals the
    underbody, so suction decays as the gap opens (saturating at very small gaps, where the
    channel chokes); thick struts block the channel and lose some suction.
    """
    r = np.asarray(ramp_angle, dtype=float)
    b = np.asarray(boattail_length, dtype=float)
    d = np.asarray(diffuser_angle, dtype=float)
    tc = np.asarray(thickness_ratio, dtype=float)
    g = np.asarray(skirt_gap, dtype=float)
    diffuser = 1.0 + 0.09 * d
    upsweep = 1.0 + 0.04 * r
    sealing = 2.5 * np.tanh(np.exp(-(g - 0.03) / 0.012) / 2.5)
    blockage = 1.0 - 1.5 * (tc - 0.12)
    length = b / 0.7
    return _scalar_or_array(_SUCTION_SCALE * diffuser * upsweep * sealing * blockage * length)


def _lift(
    r: NDArray[np.float64],
    b: NDArray[np.float64],
    d: NDArray[np.float64],
    tc: NDArray[np.float64],
    g: NDArray[np.float64],
    n: NDArray[np.float64],
    m: NDArray[np.float64],
) -> NDArray[np.float64]:
    """Vertical force coefficient: suction (down) plus the shock-driven unloading (up)."""
    cf = np.asarray(compressibility_factor(m))
    sig = _logistic((m - np.asarray(shock_onset_mach(r, b))) / _SHOCK_WIDTH)
    suction = -np.asarray(underbody_suction(r, b, d, tc, g)) * cf * (1.0 - _SHOCK_UNLOAD * sig)
    mismatch = (d - np.asarray(diffuser_match_angle(r, b))) / 4.0
    shock = (
        _SHOCK_LIFT
        * (0.3 + 1.2 * mismatch**2 / (1.0 + 0.2 * mismatch**2))  # shock off the diffuser exit
        * (0.1 + 0.9 * g / 0.03)  # the gap bleeds post-shock air under the body
        * (0.78 + 0.154 / b)  # a short boattail concentrates the turning
        * (1.0 + 25.0 * (tc - 0.12) ** 2)  # strut shocks, smallest near t/c 0.12
        * (1.0 - 0.04 * (n - 3.0) + 0.10 * (n - 3.0) ** 2)  # three fins split the shock best
    )
    expansion = (
        _EXPANSION * np.radians(r) * np.exp(-0.5 * (r / _RAMP_SEPARATION_DEG) ** 2) * cf
    )
    return suction + sig * (shock - expansion)


def _drag(
    r: NDArray[np.float64],
    b: NDArray[np.float64],
    d: NDArray[np.float64],
    tc: NDArray[np.float64],
    g: NDArray[np.float64],
    n: NDArray[np.float64],
    m: NDArray[np.float64],
) -> NDArray[np.float64]:
    """Drag coefficient: friction, base, Lock rise, Ackeret-type wave drag, fins, spillage."""
    cf = np.asarray(compressibility_factor(m))
    sonic = _logistic((m - 1.0) / _SONIC_WIDTH)
    friction = (0.060 + 0.03 * (b - 0.7)) * (1.0 - 0.05 * (m - 0.3))  # wetted area grows with b
    base = (
        0.10
        * (1.0 + 1.5 * sonic)  # base pressure falls further behind a supersonic body
        * (0.7 / b) ** 0.5  # a longer boattail closes the base
        * (1.0 + 0.03 * (r - 8.0))  # upsweep enlarges the separated base
        * (1.0 - 0.05 * (d - 6.0) + 0.002 * (d - 6.0) ** 2)  # diffuser recovers base pressure
    )
    # Korn with an effective section thickness (struts occupy part of the section) and the
    # underbody suction standing in for the section lift.
    suction = np.asarray(underbody_suction(r, b, d, tc, g))
    mcrit = np.asarray(korn_lock_critical_mach(0.06 + 0.5 * tc, 0.5 * suction))
    rise = _RISE_CAP * np.tanh(np.asarray(lock_drag_rise(m, mcrit)) / _RISE_CAP)
    ackeret_like = (math.pi / 2.0) * cf  # equals 1/sqrt(M^2 - 1) above M 1.2, finite below
    wave = (
        sonic
        * 4.0
        * ackeret_like
        * ((2.0 / 3.0) * 0.6 * tc**2 + 0.2 * np.radians(r) ** 2)  # struts + ramp
    )
    fins = n * (0.008 + 0.02 * sonic * cf)
    spill = 1.5 * (g - 0.03) * sonic  # post-shock air spilling through the skirt gap
    struts = 0.3 * tc**2  # subsonic form drag of the struts
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

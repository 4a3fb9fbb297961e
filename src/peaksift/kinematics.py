"""Four-vector arithmetic on plain numpy arrays.

Every function here takes and returns numpy arrays (or anything ``numpy.asarray``
accepts, including flat awkward contents) and broadcasts like a ufunc.  Energies,
momenta and masses are in GeV; angles in radians.

Which function to use
---------------------
* From detector coordinates to components: :func:`to_cartesian`; back again:
  :func:`from_cartesian`.
* Mass of a summed four-vector (what the pairing rules other than ``choose="all"`` use):
  :func:`invariant_mass`.  For exactly two objects given as (pt, eta, phi, mass),
  :func:`pair_mass` (and :func:`pair_kinematics`: mass, pT and rapidity of the pair) is free
  of cancellation, even for nearly collinear pairs; its building blocks
  :func:`polar_object_terms` and :func:`polar_pair_terms` also run inside numba kernels
  (the pairing layer's ``choose="all"`` path).
* Angles and shapes of an event: :func:`rapidity`, :func:`pseudorapidity`,
  :func:`delta_phi` (wrapped into [-pi, pi)), :func:`delta_r`, :func:`transverse_mass`.
* Decays and thresholds: :func:`two_body_momentum`, :func:`sqrt_s_collider`,
  :func:`sqrt_s_fixed_target`, :func:`threshold_beam_energy`.

Negative mass squared
---------------------
Rounding can make ``E**2 - |p|**2`` slightly negative for light objects.
:func:`invariant_mass` sets such values to 0 when ``|m**2|`` is below ``rtol * E**2``
(``rtol`` defaults to 1e-6 for single-precision inputs and 1e-12 for double precision).
A mass squared more negative than that is not rounding: the result is NaN there and one
:class:`~peaksift.errors.DataWarning` reports how many entries were affected.

The formulas are those of the Particle Data Group, Review of Particle Physics,
section "Kinematics" (four-vectors, two-body decays, the invariant s for collider and
fixed-target beams).
"""

from __future__ import annotations

import warnings

import numpy as np
from numpy.typing import ArrayLike

from .errors import DataWarning

__all__ = [
    "delta_phi",
    "delta_r",
    "from_cartesian",
    "half_angle_squares",
    "invariant_mass",
    "mass_squared",
    "pair_kinematics",
    "pair_mass",
    "polar_object_terms",
    "polar_pair_terms",
    "pseudorapidity",
    "rapidity",
    "sqrt_s_collider",
    "sqrt_s_fixed_target",
    "threshold_beam_energy",
    "to_cartesian",
    "transverse_mass",
    "two_body_momentum",
]


def _f64(x: ArrayLike) -> np.ndarray:
    return np.asarray(x, dtype=np.float64)


def _default_rtol(*arrays: ArrayLike) -> float:
    """1e-6 if any input is single precision (or lower), else 1e-12."""
    for a in arrays:
        dt = getattr(a, "dtype", None)
        if dt is not None and np.issubdtype(dt, np.floating) and np.finfo(dt).bits < 64:
            return 1e-6
    return 1e-12


def to_cartesian(
    pt: ArrayLike, eta: ArrayLike, phi: ArrayLike, mass: ArrayLike
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    r"""Cartesian components ``(px, py, pz, e)`` from ``(pt, eta, phi, mass)``.

    .. math::
        p_x = p_T\cos\phi,\quad p_y = p_T\sin\phi,\quad p_z = p_T\sinh\eta,\quad
        E = \sqrt{(p_T\cosh\eta)^2 + m^2}

    using ``|p| = pT cosh(eta)`` (PDG Review, "Kinematics", pseudorapidity).  The energy
    is computed with ``hypot`` so no intermediate square overflows or loses digits.

    Parameters
    ----------
    pt, eta, phi, mass : array_like
        Transverse momentum (GeV), pseudorapidity, azimuth (rad), mass (GeV).

    Returns
    -------
    px, py, pz, e : numpy.ndarray (float64)
    """
    pt, eta, phi, mass = _f64(pt), _f64(eta), _f64(phi), _f64(mass)
    px = pt * np.cos(phi)
    py = pt * np.sin(phi)
    pz = pt * np.sinh(eta)
    e = np.hypot(pt * np.cosh(eta), mass)
    return px, py, pz, e


def mass_squared(
    e: np.ndarray, px: np.ndarray, py: np.ndarray, pz: np.ndarray, rtol: float
) -> tuple[np.ndarray, np.ndarray]:
    r"""Mass squared :math:`(E - |\vec p|)(E + |\vec p|)` with the rounding rule of
    :func:`invariant_mass`, and where it is genuinely negative.

    For callers that handle negative values themselves (the reader drops such objects);
    :func:`invariant_mass` is the usual entry point.

    Parameters
    ----------
    e, px, py, pz : numpy.ndarray
        Energy and momentum components in GeV, float64 (broadcast together).
    rtol : float
        Tolerance on ``-m^2 / E^2`` treated as rounding (those entries become 0).

    Returns
    -------
    m2 : numpy.ndarray
        Mass squared in GeV^2; still negative where ``negative`` is True.
    negative : numpy.ndarray of bool
        True where ``m^2 < -rtol E^2`` (energy smaller than momentum, not rounding).
    """
    p = np.sqrt(px * px + py * py + pz * pz)
    m2 = (e - p) * (e + p)
    tiny = (m2 < 0) & (-m2 <= rtol * e * e)
    m2 = np.where(tiny, 0.0, m2)
    bad = m2 < 0
    return m2, bad


def from_cartesian(
    px: ArrayLike, py: ArrayLike, pz: ArrayLike, e: ArrayLike, *, rtol: float | None = None
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    r"""Detector coordinates ``(pt, eta, phi, mass)`` from ``(px, py, pz, e)``.

    .. math::
        p_T = \sqrt{p_x^2+p_y^2},\quad \eta = \operatorname{asinh}(p_z/p_T),\quad
        \phi = \operatorname{atan2}(p_y, p_x),\quad m = \sqrt{(E-|p|)(E+|p|)}

    (PDG Review, "Kinematics").  ``eta`` is +-inf for ``pT = 0``.  The mass follows the
    negative-m² policy of :func:`invariant_mass` (clamped to 0 within ``rtol``, NaN and a
    :class:`~peaksift.errors.DataWarning` beyond).
    """
    rtol = _default_rtol(px, py, pz, e) if rtol is None else float(rtol)
    mass = invariant_mass(e, px, py, pz, rtol=rtol)
    px, py, pz = _f64(px), _f64(py), _f64(pz)
    pt = np.hypot(px, py)
    with np.errstate(divide="ignore", invalid="ignore"):
        eta = np.arcsinh(pz / pt)
    eta = np.where(pt == 0, np.copysign(np.inf, pz), eta)
    phi = np.arctan2(py, px)
    return pt, eta, phi, mass


def invariant_mass(
    e: ArrayLike,
    px: ArrayLike,
    py: ArrayLike,
    pz: ArrayLike,
    *,
    rtol: float | None = None,
    warn: bool = True,
) -> np.ndarray:
    r"""Invariant mass of a four-vector (typically the sum of a pair's four-vectors).

    .. math:: m = \sqrt{E^2 - |\vec p|^2} = \sqrt{(E - |\vec p|)(E + |\vec p|)}

    (PDG Review, "Kinematics").  The factored form keeps the squares of large numbers out of
    the subtraction.  A mass squared in ``[-rtol E^2, 0)`` is rounding and gives 0; below
    that the result is NaN and, if ``warn``, one :class:`~peaksift.errors.DataWarning`
    states how many entries had a genuinely negative mass squared.

    Parameters
    ----------
    e, px, py, pz : array_like
        Energy and momentum components in GeV (broadcast together).
    rtol : float, optional
        Tolerance on ``-m^2 / E^2`` treated as rounding.  Default 1e-6 when any input is
        single precision, else 1e-12.
    warn : bool
        Warn once per call when entries are set to NaN.

    Returns
    -------
    numpy.ndarray (float64)
    """
    rtol = _default_rtol(e, px, py, pz) if rtol is None else float(rtol)
    e, px, py, pz = _f64(e), _f64(px), _f64(py), _f64(pz)
    m2, bad = mass_squared(e, px, py, pz, rtol)
    n_bad = int(np.count_nonzero(bad))
    if n_bad:
        m2 = np.where(bad, np.nan, m2)
        if warn:
            warnings.warn(
                f"invariant_mass: {n_bad} of {m2.size} four-vectors have E^2 - p^2 below "
                f"-{rtol:g} * E^2 (energy smaller than momentum, not rounding); their mass is NaN",
                DataWarning,
                stacklevel=2,
            )
    return np.sqrt(m2)


_PIO2_HI = 1.5707963267948966  # pi/2 rounded to double, and the remainder (Cody-Waite split)
_PIO2_LO = 6.123233995736766e-17
_PI_HI = 3.141592653589793
_PI_LO = 1.2246467991473532e-16
_PIO4 = 0.7853981633974483
_INV_2PI = 0.15915494309189535
_2PI_A = 6.283185303211212  # 0x1.921fb54p+2
_2PI_B = 3.968374295837407e-09  # 0x1.10b461p-28
_2PI_C = 2.2884754904439327e-17
# Taylor coefficients (-1)^k / (2k+1)! of sin
_S3, _S5, _S7, _S9 = -1.0 / 6.0, 1.0 / 120.0, -1.0 / 5040.0, 1.0 / 362880.0
_S11, _S13 = -1.0 / 39916800.0, 1.0 / 6227020800.0
_S15, _S17 = -1.0 / 1307674368000.0, 1.0 / 355687428096000.0


def polar_object_terms(pt: ArrayLike, eta: ArrayLike, mass: ArrayLike) -> tuple:
    r"""Per-object terms of the polar pair formulas (:func:`pair_kinematics`).

    Returns ``(mt, a, r)``: the transverse mass :math:`m_T = \sqrt{p_T^2 + m^2}` and
    :math:`a = e^{y}`, :math:`r = e^{-y}` of the rapidity :math:`y`.  With
    :math:`p_z = p_T\sinh\eta` and :math:`E = \sqrt{(p_T\cosh\eta)^2 + m^2}` one has
    :math:`E \pm p_z = m_T e^{\pm y}` (PDG Review, "Kinematics"); the larger of the two,
    :math:`E + |p_z|`, has no cancellation, and the smaller is :math:`m_T^2 / (E + |p_z|)`.
    :math:`\cosh\eta` and :math:`|\sinh\eta|` are formed from one exponential
    :math:`x = e^{|\eta|}` as :math:`(x \pm 1/x)/2` (an absolute error of a few ulp in
    :math:`|\sinh\eta|` is harmless: it is added to the larger :math:`E`).  An object
    with :math:`m_T = 0` (a null four-vector) gets ``a = r = 0``.

    Written with numpy functions and arithmetic only (selections multiply by 0.0/1.0, which
    is exact for finite values), so the same code runs on numpy arrays and inside numba
    kernels (``numba.njit(inline="always")(polar_object_terms)``).
    """
    mt = np.sqrt(pt * pt + mass * mass)
    x = np.exp(np.abs(eta))
    ix = 1.0 / x
    ch = 0.5 * (x + ix)
    ash = 0.5 * (x - ix)
    ptch = pt * ch
    big = np.sqrt(ptch * ptch + mass * mass) + pt * ash  # E + |pz| = mT e^{|y|}
    ok = (mt > 0) * 1.0
    den = mt + (1.0 - ok)
    up = big / den  # e^{|y|}
    down = den / (big + (1.0 - ok))  # e^{-|y|}
    neg = (eta < 0) * 1.0
    a = (up * (1.0 - neg) + down * neg) * ok
    r = (down * (1.0 - neg) + up * neg) * ok
    return mt, a, r


def half_angle_squares(dphi: ArrayLike) -> tuple:
    r""":math:`\sin^2(\Delta\phi/2)` and :math:`\cos^2(\Delta\phi/2)` for
    any :math:`\Delta\phi`, with one sine (a polynomial) and full relative precision in
    both for :math:`|\Delta\phi| \le 2\pi`.

    With :math:`u = |\Delta\phi|/2 \in [0, \pi]`: for :math:`u \le \pi/4`,
    :math:`\sin^2 = \sin^2 u`; for :math:`\pi/4 < u \le 3\pi/4`,
    :math:`\cos^2 = \sin^2(\pi/2 - u)`; above, :math:`\sin^2 = \sin^2(\pi - u)`
    (common practice: reduction by multiples of :math:`\pi/2` with the constant split in
    two parts, the first subtraction exact by Sterbenz' lemma).  The other square is
    :math:`1 - w^2` with :math:`w^2 \le 1/2`, which does not cancel.  Both squares are
    periodic in :math:`\Delta\phi` with period :math:`2\pi`, so azimuths in
    :math:`[-\pi, \pi]` need no wrapping; a larger :math:`|\Delta\phi|` has whole turns
    removed first (leaving an absolute error of a few ulp of :math:`\pi`).  Arithmetic
    only (numpy arrays and numba kernels alike).
    """
    # whole turns off when |dphi| > 2 pi (2 pi in three parts, the first two with 26 bits,
    # so k times them is exact); k = 0 (the usual case) leaves dphi bit for bit
    k = np.floor(dphi * _INV_2PI + 0.5) * (np.abs(dphi) > 2.0 * _PI_HI)
    u = np.abs(0.5 * (((dphi - k * _2PI_A) - k * _2PI_B) - k * _2PI_C))
    m1 = (u > _PIO4) * (u <= 3.0 * _PIO4) * 1.0
    m2 = (u > 3.0 * _PIO4) * 1.0
    m0 = 1.0 - m1 - m2
    v = u * m0 + ((_PIO2_HI - u) + _PIO2_LO) * m1 + ((_PI_HI - u) + _PI_LO) * m2
    # sin(v) for |v| <= pi/4 from its Taylor series through v^17: the first omitted term,
    # |v|^19/19! <= 8.5e-20, is far below the double-precision rounding of sin(v) (~1e-16
    # relative); evaluated by Horner's rule in v^2 (arithmetic only, several times faster
    # than a libm call inside a loop)
    q = v * v
    w = v + v * q * (_S3 + q * (_S5 + q * (_S7 + q * (_S9 + q * (_S11 + q * (
        _S13 + q * (_S15 + q * _S17)))))))
    w2 = w * w
    other = 1.0 - w2
    sin2 = w2 * (1.0 - m1) + other * m1
    cos2 = other * (1.0 - m1) + w2 * m1
    return sin2, cos2


def polar_pair_terms(pt1: ArrayLike, m1: ArrayLike, mt1: ArrayLike, a1: ArrayLike,
                     r1: ArrayLike, pt2: ArrayLike, m2: ArrayLike, mt2: ArrayLike,
                     a2: ArrayLike, r2: ArrayLike, sin2: ArrayLike, cos2: ArrayLike) -> tuple:
    r"""Mass squared, pT squared and rapidity of a pair from :func:`polar_object_terms`
    and :func:`half_angle_squares` (``sin2``, ``cos2`` of half the azimuthal difference).

    The one implementation of the polar pair formulas (:func:`pair_kinematics` on arrays,
    the pairing kernels through ``numba.njit(inline="always")``).  See
    :func:`pair_kinematics` for the derivation.  Returns ``(m2, pt2, y)``.
    """
    ptpt = pt1 * pt2
    mtmt = mt1 * mt2
    q1 = m1 * m1
    q2 = m2 * m2
    den = mtmt + ptpt
    mixed = (q1 * pt2 * pt2 + q2 * pt1 * pt1 + q1 * q2) / (den + (den == 0) * 1.0)
    msq = q1 + q2 + mtmt * (a1 - a2) * (r2 - r1) + 2.0 * mixed + 4.0 * ptpt * sin2
    d = pt1 - pt2
    ptsq = d * d + 4.0 * ptpt * cos2
    y = 0.5 * np.log((mt1 * a1 + mt2 * a2) / (mt1 * r1 + mt2 * r2))
    return msq, ptsq, y


def pair_kinematics(
    pt1: ArrayLike,
    eta1: ArrayLike,
    phi1: ArrayLike,
    m1: ArrayLike,
    pt2: ArrayLike,
    eta2: ArrayLike,
    phi2: ArrayLike,
    m2: ArrayLike,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    r"""Invariant mass, transverse momentum and rapidity of the sum of two objects given as
    (pt, eta, phi, mass), free of cancellation and with one sine per pair.

    With transverse masses :math:`m_{T,i} = \sqrt{p_{T,i}^2 + m_i^2}` and rapidities
    :math:`y_i` one has :math:`E_i = m_{T,i}\cosh y_i`, :math:`p_{z,i} = m_{T,i}\sinh y_i`
    (PDG Review, "Kinematics"), hence

    .. math::
        E_1E_2 - \vec p_1\cdot\vec p_2 = m_{T1}m_{T2}\cosh\Delta y
        - p_{T1}p_{T2}\cos\Delta\phi .

    Using :math:`\cosh\Delta y = 1 + 2\sinh^2\tfrac{\Delta y}{2}`,
    :math:`\cos\Delta\phi = 1 - 2\sin^2\tfrac{\Delta\phi}{2}` and
    :math:`(m_{T1}m_{T2})^2 - (p_{T1}p_{T2})^2 = m_1^2p_{T2}^2 + m_2^2p_{T1}^2 + m_1^2m_2^2`,

    .. math::
        m^2 = m_1^2 + m_2^2 + 2\Big[2 m_{T1}m_{T2}\sinh^2\tfrac{\Delta y}{2}
        + \frac{m_1^2 p_{T2}^2 + m_2^2 p_{T1}^2 + m_1^2 m_2^2}{m_{T1}m_{T2} + p_{T1}p_{T2}}
        + 2 p_{T1}p_{T2}\sin^2\tfrac{\Delta\phi}{2}\Big],

    a sum of non-negative terms (common practice), so nearly collinear light pairs keep full
    relative precision where :math:`E^2 - |\vec p|^2` would lose it.  With
    :math:`a_i = e^{y_i}`, :math:`r_i = e^{-y_i}` (:func:`polar_object_terms`),
    :math:`4\sinh^2\tfrac{\Delta y}{2} = e^{\Delta y} + e^{-\Delta y} - 2
    = (a_1 - a_2)(r_2 - r_1)`, a product of two differences of equal sign, needing no
    hyperbolic function per pair.

    The pair's transverse momentum follows from
    :math:`p_T^2 = p_{T1}^2 + p_{T2}^2 + 2p_{T1}p_{T2}\cos\Delta\phi
    = (p_{T1} - p_{T2})^2 + 4p_{T1}p_{T2}\cos^2\tfrac{\Delta\phi}{2}` (non-negative
    terms again, exact for back-to-back pairs), its rapidity from
    :math:`y = \tfrac12\ln\frac{E + p_z}{E - p_z}` with
    :math:`E \pm p_z = m_{T1}e^{\pm y_1} + m_{T2}e^{\pm y_2}` (sums of positive terms, so
    forward pairs do not lose :math:`E - p_z`).

    Returns
    -------
    mass, pt, rapidity : numpy.ndarray (float64)
    """
    pt1, eta1, phi1, m1 = _f64(pt1), _f64(eta1), _f64(phi1), _f64(m1)
    pt2, eta2, phi2, m2 = _f64(pt2), _f64(eta2), _f64(phi2), _f64(m2)
    with np.errstate(divide="ignore", invalid="ignore"):
        mt1, a1, r1 = polar_object_terms(pt1, eta1, m1)
        mt2, a2, r2 = polar_object_terms(pt2, eta2, m2)
        sin2, cos2 = half_angle_squares(phi1 - phi2)
        msq, ptsq, y = polar_pair_terms(pt1, m1, mt1, a1, r1, pt2, m2, mt2, a2, r2,
                                        sin2, cos2)
    return np.sqrt(msq), np.sqrt(ptsq), y


def pair_mass(
    pt1: ArrayLike,
    eta1: ArrayLike,
    phi1: ArrayLike,
    m1: ArrayLike,
    pt2: ArrayLike,
    eta2: ArrayLike,
    phi2: ArrayLike,
    m2: ArrayLike,
) -> np.ndarray:
    r"""Invariant mass of two objects given as (pt, eta, phi, mass), without cancellation.

    The mass column of :func:`pair_kinematics` (see there for the formula:
    :math:`m^2` as a sum of non-negative terms, PDG Review "Kinematics"), so nearly
    collinear light pairs keep full relative precision.  Returns float64.
    """
    return pair_kinematics(pt1, eta1, phi1, m1, pt2, eta2, phi2, m2)[0]


def rapidity(e: ArrayLike, pz: ArrayLike) -> np.ndarray:
    r"""Rapidity :math:`y = \tfrac12 \ln\frac{E + p_z}{E - p_z}` (PDG Review, "Kinematics").

    Computed as ``sign(pz) * (log(E+|pz|) - log(E-|pz|)) / 2`` so the small denominator
    is formed once.  ``|pz| = E`` gives +-inf; ``|pz| > E`` gives NaN.
    """
    e, pz = _f64(e), _f64(pz)
    apz = np.abs(pz)
    with np.errstate(divide="ignore", invalid="ignore"):
        y = 0.5 * (np.log(e + apz) - np.log(e - apz))
    return np.copysign(y, pz)


def pseudorapidity(px: ArrayLike, py: ArrayLike, pz: ArrayLike) -> np.ndarray:
    r"""Pseudorapidity :math:`\eta = -\ln\tan(\theta/2) = \operatorname{asinh}(p_z/p_T)`.

    (PDG Review, "Kinematics".)  The ``asinh`` form is exact for all angles; ``pT = 0``
    gives +-inf with the sign of ``pz``.
    """
    px, py, pz = _f64(px), _f64(py), _f64(pz)
    pt = np.hypot(px, py)
    with np.errstate(divide="ignore", invalid="ignore"):
        eta = np.arcsinh(pz / pt)
    return np.where(pt == 0, np.copysign(np.inf, pz), eta)


def delta_phi(phi1: ArrayLike, phi2: ArrayLike) -> np.ndarray:
    r"""Azimuthal difference ``phi1 - phi2`` wrapped into :math:`[-\pi, \pi)` (common practice)."""
    d = _f64(phi1) - _f64(phi2)
    # subtracting whole turns leaves small differences exact (no detour through +pi)
    d = d - (2.0 * np.pi) * np.round(d / (2.0 * np.pi))
    return np.where(d >= np.pi, d - 2.0 * np.pi, d)


def delta_r(eta1: ArrayLike, phi1: ArrayLike, eta2: ArrayLike, phi2: ArrayLike) -> np.ndarray:
    r"""Angular distance :math:`\Delta R = \sqrt{\Delta\eta^2 + \Delta\phi^2}` with wrapped
    :math:`\Delta\phi` (common practice at hadron colliders)."""
    return np.hypot(_f64(eta1) - _f64(eta2), delta_phi(phi1, phi2))


def transverse_mass(
    pt1: ArrayLike, phi1: ArrayLike, pt2: ArrayLike, phi2: ArrayLike
) -> np.ndarray:
    r"""Transverse mass of two massless objects (e.g. a lepton and missing momentum).

    .. math:: m_T = \sqrt{2 p_{T1} p_{T2} (1 - \cos\Delta\phi)}
                  = 2\sqrt{p_{T1}p_{T2}}\,\lvert\sin(\Delta\phi/2)\rvert

    (PDG Review, "Kinematics", and common practice for W-boson mass measurements.)  The
    half-angle form avoids the cancellation in ``1 - cos`` for small angles.
    """
    pt1, pt2 = _f64(pt1), _f64(pt2)
    return 2.0 * np.sqrt(pt1 * pt2) * np.abs(np.sin(0.5 * delta_phi(phi1, phi2)))


def two_body_momentum(M: ArrayLike, m1: ArrayLike, m2: ArrayLike) -> np.ndarray:
    r"""Momentum of either daughter in the rest frame of a two-body decay ``M -> m1 m2``.

    .. math:: p^* = \frac{\sqrt{[M^2-(m_1+m_2)^2]\,[M^2-(m_1-m_2)^2]}}{2M}

    (PDG Review, "Kinematics", two-body decays.)  The brackets are factored as
    ``(M-m1-m2)(M+m1+m2)`` and ``(M-m1+m2)(M+m1-m2)``.  Below threshold
    (``M < m1 + m2``) the result is NaN.
    """
    M, m1, m2 = _f64(M), _f64(m1), _f64(m2)
    a = (M - m1 - m2) * (M + m1 + m2)
    b = (M - m1 + m2) * (M + m1 - m2)
    with np.errstate(invalid="ignore", divide="ignore"):
        p = np.sqrt(a * b) / (2.0 * M)
    return np.where(a >= 0, p, np.nan)


def sqrt_s_collider(
    e1: ArrayLike, e2: ArrayLike, m1: ArrayLike = 0.0, m2: ArrayLike = 0.0
) -> np.ndarray:
    r"""Centre-of-mass energy of two head-on beams with energies ``e1``, ``e2``.

    .. math:: s = m_1^2 + m_2^2 + 2(E_1E_2 + |p_1||p_2|),\quad |p_i| = \sqrt{E_i^2 - m_i^2}

    (PDG Review, "Kinematics").  All terms are non-negative, so there is no cancellation;
    for massless beams :math:`\sqrt s = 2\sqrt{E_1E_2}`.
    """
    e1, e2, m1, m2 = _f64(e1), _f64(e2), _f64(m1), _f64(m2)
    p1 = np.sqrt((e1 - m1) * (e1 + m1))
    p2 = np.sqrt((e2 - m2) * (e2 + m2))
    return np.sqrt(m1 * m1 + m2 * m2 + 2.0 * (e1 * e2 + p1 * p2))


def sqrt_s_fixed_target(
    beam_energy: ArrayLike,
    beam_mass: ArrayLike,
    target_mass: ArrayLike,
    *,
    kinetic: bool = False,
) -> np.ndarray:
    r"""Centre-of-mass energy of a beam on a target at rest.

    .. math:: s = m_a^2 + m_b^2 + 2E_a m_b = (m_a + m_b)^2 + 2T_a m_b

    (PDG Review, "Kinematics").  ``beam_energy`` is the total energy :math:`E_a`, or the
    kinetic energy :math:`T_a = E_a - m_a` when ``kinetic=True`` (then the second form is used,
    which has no cancellation).
    """
    ea, ma, mb = _f64(beam_energy), _f64(beam_mass), _f64(target_mass)
    if kinetic:
        return np.sqrt((ma + mb) ** 2 + 2.0 * ea * mb)
    return np.sqrt(ma * ma + mb * mb + 2.0 * ea * mb)


def threshold_beam_energy(
    final_mass: ArrayLike,
    beam_mass: ArrayLike,
    target_mass: ArrayLike,
    *,
    kinetic: bool = False,
) -> np.ndarray:
    r"""Beam energy needed on a fixed target to produce a final state of total mass ``M``.

    Setting :math:`\sqrt s = M` in :func:`sqrt_s_fixed_target`:

    .. math::
        E_a = \frac{M^2 - m_a^2 - m_b^2}{2 m_b},\qquad
        T_a = E_a - m_a = \frac{(M - m_a - m_b)(M + m_a + m_b)}{2 m_b}

    (PDG Review, "Kinematics"; e.g. Griffiths, Introduction to Elementary Particles, 2nd ed.,
    2008, for p p -> p p p pbar, where :math:`T = 6 m_p`).  Returns the total energy, or the
    kinetic energy with ``kinetic=True``.  A final mass below ``m_a + m_b`` needs no energy:
    the kinetic threshold is then 0 (total energy ``m_a``).
    """
    M, ma, mb = _f64(final_mass), _f64(beam_mass), _f64(target_mass)
    t = np.maximum((M - ma - mb) * (M + ma + mb) / (2.0 * mb), 0.0)
    return t if kinetic else t + ma

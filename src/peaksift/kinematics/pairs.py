"""The mass, transverse momentum and rapidity of two objects given as (pt, eta, phi, mass),
free of cancellation: the polar pair formulas.

* :func:`pair_kinematics` -- mass, pT and rapidity of the pair (the derivation is in its
  docstring); :func:`pair_mass` -- its mass column.
* Their building blocks :func:`polar_object_terms` (once per object),
  :func:`half_angle_squares` (once per pair, one sine) and :func:`polar_pair_terms` are
  written with numpy functions and arithmetic only, so the same code runs on numpy arrays
  and inside the pairing layer's numba kernels (``numba.njit(inline="always")``).
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike

from .vectors import _f64

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

"""Four-vector arithmetic on plain numpy arrays.

Every function here takes and returns numpy arrays (or anything ``numpy.asarray``
accepts, including flat awkward contents) and broadcasts like a ufunc.  Energies,
momenta and masses are in GeV; angles in radians.

Which function to use
---------------------
* From detector coordinates to components: :func:`to_cartesian`; back again:
  :func:`from_cartesian`.
* Mass of a summed four-vector (the one mass formula the pairing layer uses):
  :func:`invariant_mass`.  For exactly two objects given as (pt, eta, phi, mass),
  :func:`pair_mass` is free of cancellation, even for nearly collinear pairs.
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
    "invariant_mass",
    "pair_mass",
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


def _mass_squared_and_bad(
    e: np.ndarray, px: np.ndarray, py: np.ndarray, pz: np.ndarray, rtol: float
) -> tuple[np.ndarray, np.ndarray]:
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
    m2, bad = _mass_squared_and_bad(e, px, py, pz, rtol)
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

    With transverse masses :math:`m_{T,i} = \sqrt{p_{T,i}^2 + m_i^2}` and rapidities
    :math:`y_i`, :math:`E_1E_2 - \vec p_1\cdot\vec p_2 = m_{T1}m_{T2}\cosh\Delta y -
    p_{T1}p_{T2}\cos\Delta\phi` (PDG Review, "Kinematics"), which is rewritten as a sum of
    non-negative terms:

    .. math::
        m^2 = m_1^2 + m_2^2 + 2\Big[2 m_{T1}m_{T2}\sinh^2\tfrac{\Delta y}{2}
        + 2 p_{T1}p_{T2}\sin^2\tfrac{\Delta\phi}{2}
        + \frac{m_1^2 p_{T2}^2 + m_2^2 p_{T1}^2 + m_1^2 m_2^2}{m_{T1}m_{T2} + p_{T1}p_{T2}}\Big]

    so nearly collinear light pairs keep full relative precision.  Returns float64.
    """
    pt1, eta1, phi1, m1 = _f64(pt1), _f64(eta1), _f64(phi1), _f64(m1)
    pt2, eta2, phi2, m2 = _f64(pt2), _f64(eta2), _f64(phi2), _f64(m2)
    mt1 = np.hypot(pt1, m1)
    mt2 = np.hypot(pt2, m2)
    with np.errstate(divide="ignore", invalid="ignore"):
        y1 = np.arcsinh(pt1 * np.sinh(eta1) / mt1)
        y2 = np.arcsinh(pt2 * np.sinh(eta2) / mt2)
        denom = mt1 * mt2 + pt1 * pt2
        mixed = (m1 * m1 * pt2 * pt2 + m2 * m2 * pt1 * pt1 + m1 * m1 * m2 * m2) / denom
    mixed = np.where(denom > 0, mixed, 0.0)
    y1 = np.where(mt1 > 0, y1, 0.0)
    y2 = np.where(mt2 > 0, y2, 0.0)
    dphi = delta_phi(phi1, phi2)
    sh = np.sinh(0.5 * (y1 - y2))
    sn = np.sin(0.5 * dphi)
    msq = m1 * m1 + m2 * m2 + 2.0 * (2.0 * mt1 * mt2 * sh * sh + 2.0 * pt1 * pt2 * sn * sn + mixed)
    return np.sqrt(msq)


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

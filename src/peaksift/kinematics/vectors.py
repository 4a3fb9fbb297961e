"""Four-vectors and angles on numpy arrays: to and from Cartesian components, the invariant
mass with its negative-mass-squared rule, rapidity, pseudorapidity, azimuthal and angular
distances, the transverse mass (the package guide, :mod:`peaksift.kinematics`, says which to
use)."""

from __future__ import annotations

import warnings

import numpy as np
from numpy.typing import ArrayLike

from ..errors import DataWarning


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
    eta = pseudorapidity(px, py, pz)
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

"""Two-body decays and collision energies: :func:`two_body_momentum`,
:func:`sqrt_s_collider`, :func:`sqrt_s_fixed_target`, :func:`threshold_beam_energy`
(PDG Review, "Kinematics")."""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike

from .vectors import _f64


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

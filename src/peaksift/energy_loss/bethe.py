"""The Bethe equation: mean energy loss of a heavy charged particle in a material.

The formulas (PDG Review of Particle Physics, "Passage of particles through matter")
--------------------------------------------------------------------------------------
Bethe equation for a heavy charged particle of charge number z:

.. math:: \\langle -dE/dx \\rangle = K z^2 \\frac{Z}{A} \\frac{1}{\\beta^2}
          \\left[\\tfrac12 \\ln\\frac{2 m_e c^2 \\beta^2\\gamma^2 T_{max}}{I^2} - \\beta^2
          - \\frac{\\delta(\\beta\\gamma)}{2}\\right],\\qquad K = 0.307075\\ \\mathrm{MeV\\,mol^{-1}cm^2}

with the full maximum energy transfer to one electron
:math:`T_{max} = 2 m_e c^2 \\beta^2\\gamma^2 / (1 + 2\\gamma m_e/M + (m_e/M)^2)` and the
density-effect correction in Sternheimer's parameterisation (Sternheimer, Berger, Seltzer,
Atomic Data and Nuclear Data Tables 30 (1984) 261), with :math:`X = \\log_{10}\\beta\\gamma`:

.. math:: \\delta = \\begin{cases} 2\\ln 10\\,X - \\bar C & X \\ge X_1 \\\\
          2\\ln 10\\,X - \\bar C + a (X_1 - X)^k & X_0 \\le X < X_1 \\\\
          \\delta_0\\, 10^{2(X - X_0)} & X < X_0 \\end{cases}

No shell correction and no Barkas or Bloch terms: the equation is good to a few per cent for
0.1 ≲ βγ ≲ 1000, the range of tracking-detector identification.
"""

from __future__ import annotations

import math

import numpy as np
from numpy.typing import ArrayLike

from ..errors import ConfigError
from .materials import Material, material

__all__ = ["K_BETHE", "M_E_MEV", "density_correction", "max_energy_transfer",
           "mean_energy_loss", "mean_energy_loss_at"]

#: K = 4π N_A r_e² m_e c² in MeV mol⁻¹ cm² (PDG Review, "Passage of particles through matter").
K_BETHE = 0.307075
#: electron mass in MeV (CODATA 2018, scipy.constants "electron mass energy equivalent in MeV")
M_E_MEV = 0.51099895069


def _f64(x: ArrayLike) -> np.ndarray:
    return np.asarray(x, dtype=np.float64)


def max_energy_transfer(betagamma: ArrayLike, mass: ArrayLike) -> np.ndarray:
    """Maximum kinetic energy transferred to a free electron in one collision, in MeV.

    :math:`T_{max} = 2 m_e c^2 \\beta^2\\gamma^2 / (1 + 2\\gamma m_e/M + (m_e/M)^2)`
    (PDG Review, "Passage of particles through matter"); ``mass`` M in GeV.
    """
    bg = _f64(betagamma)
    r = M_E_MEV / (_f64(mass) * 1000.0)
    gamma = np.sqrt(1.0 + bg * bg)
    return 2.0 * M_E_MEV * bg * bg / (1.0 + 2.0 * gamma * r + r * r)


def density_correction(betagamma: ArrayLike, mat: Material | str) -> np.ndarray:
    """Density-effect correction δ(βγ) in Sternheimer's parameterisation (module guide)."""
    m = material(mat)
    if m.components:
        raise ConfigError(f"material {m.name!r} is a mixture: its density effect is that of "
                          "each component (Bragg additivity); ask a component")
    x = np.log10(_f64(betagamma))
    two_ln10 = 2.0 * math.log(10.0)
    mid = two_ln10 * x - m.c_bar + m.a * np.clip(m.x1 - x, 0.0, None) ** m.k
    low = m.delta0 * 10.0 ** (2.0 * (np.minimum(x, m.x0) - m.x0))
    return np.where(x >= m.x0, mid, low)


def mean_energy_loss(betagamma: ArrayLike, mat: Material | str, *, mass: ArrayLike = 0.13957,
                     charge: float = 1.0) -> np.ndarray:
    """Mean mass stopping power ⟨-dE/dx⟩ in MeV cm²/g by the Bethe equation (module guide).

    Parameters
    ----------
    betagamma : array_like
        βγ = p/M of the particle (positive).
    mat : Material or str
        The medium (a name of :data:`MATERIALS` or a :class:`Material`).
    mass : array_like
        Particle mass in GeV, entering only through :math:`T_{max}` (default: a charged pion).
    charge : float
        Charge number z.
    """
    m = material(mat)
    if m.components:
        return sum(w * mean_energy_loss(betagamma, c, mass=mass, charge=charge)
                   for c, w in m.components)
    bg = _f64(betagamma)
    b2 = bg * bg / (1.0 + bg * bg)
    tmax = max_energy_transfer(bg, mass)
    i_mev = m.mean_excitation_ev * 1e-6
    log_term = 0.5 * np.log(2.0 * M_E_MEV * bg * bg * tmax / (i_mev * i_mev))
    return (K_BETHE * charge * charge * m.z_over_a / b2
            * (log_term - b2 - 0.5 * density_correction(bg, m)))


def mean_energy_loss_at(momentum: ArrayLike, mass: ArrayLike, mat: Material | str, *,
                        charge: float = 1.0) -> np.ndarray:
    """:func:`mean_energy_loss` at momentum p (GeV) for mass M (GeV): βγ = p/M."""
    p, mm = _f64(momentum), _f64(mass)
    return mean_energy_loss(p / mm, mat, mass=mm, charge=charge)

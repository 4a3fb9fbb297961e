"""The hard processes' kinematics: resonance masses (relativistic Breit-Wigner), the falling
continuum, and the parent's motion and isotropic two-body decay into the lab frame."""

from __future__ import annotations

import numpy as np

from .. import kinematics as kin
from .scenario import _MZ, Resonance, Scenario


def breit_wigner_pdf(m: np.ndarray, mass: float, width: float,
                     mass_range: tuple[float, float] | None = None) -> np.ndarray:
    r"""The generator's relativistic Breit-Wigner density in the mass ``m``.

    .. math:: f(m) = \frac{k}{(m^2 - M^2)^2 + M^2\Gamma^2},\qquad
              k = \frac{2\sqrt2\,M\Gamma\gamma}{\pi\sqrt{M^2+\gamma}},\ \gamma=\sqrt{M^2(M^2+\Gamma^2)}

    (PDG Review, "Resonances"; the normalisation k holds on :math:`m \in [0, \infty)`).
    With ``mass_range`` the density is renormalised (numerically, ``scipy.integrate.quad``)
    to that range and is zero outside it.
    """
    m = np.asarray(m, dtype=float)
    g = np.sqrt(mass**2 * (mass**2 + width**2))
    k = 2.0 * np.sqrt(2.0) * mass * width * g / (np.pi * np.sqrt(mass**2 + g))
    f = k / ((m * m - mass * mass) ** 2 + mass * mass * width * width)
    if mass_range is None:
        return f
    from scipy.integrate import quad

    lo, hi = mass_range
    norm = quad(lambda x: k / ((x * x - mass * mass) ** 2 + mass * mass * width * width), lo, hi,
                points=[mass], limit=200)[0]
    return np.where((m >= lo) & (m <= hi), f / norm, 0.0)


def _sample_breit_wigner(rng: np.random.Generator, n: int, res: Resonance) -> np.ndarray:
    """Exact sampling of :func:`breit_wigner_pdf` on ``res.mass_range``.

    In ``s = m^2`` the density is ``1/[(s-M^2)^2+M^2G^2] / (2 sqrt(s))``: propose from the
    truncated Cauchy in ``s`` by inverse CDF, accept with probability ``sqrt(s_lo / s)``.
    """
    M, G = res.mass, res.width
    s_lo, s_hi = res.mass_range[0] ** 2, res.mass_range[1] ** 2
    u_lo = np.arctan((s_lo - M * M) / (M * G))
    u_hi = np.arctan((s_hi - M * M) / (M * G))
    out = np.empty(0)
    while out.size < n:
        k = int((n - out.size) * 1.3) + 16
        s = M * M + M * G * np.tan(rng.uniform(u_lo, u_hi, k))
        acc = rng.uniform(0.0, 1.0, k) < np.sqrt(s_lo / s)
        out = np.concatenate([out, np.sqrt(s[acc])])
    return out[:n]


def continuum_pdf(m: np.ndarray, sc: Scenario) -> np.ndarray:
    r"""The generator's continuum density in the true mass ``m`` (normalised on
    ``sc.continuum_range``, zero outside).

    A mixture: with weight :math:`1 - f` the falling Drell-Yan-like term
    :math:`(1 - x)^a / x^b`, :math:`x = m/\sqrt s`, and with weight :math:`f` a broad
    shoulder, log-normal in :math:`m` with its mode at :math:`m_0` and log-width
    :math:`w = \ln(1 + r)` (lepton pairs from the decays of pair-produced heavy states
    rise and fall slowly like this): :math:`\exp(-(\ln m - \mu)^2 / 2w^2) / m`,
    :math:`\mu = \ln m_0 + w^2`.  (``f``, ``m_0``, ``r`` are ``sc.continuum_shoulder_*``.)
    The shoulder is what makes one power law a biased description of the search window:
    the demo's background-function choice has something to find.
    """
    m = np.asarray(m, dtype=float)
    lo, hi = sc.continuum_range
    grid = np.geomspace(lo, hi, 8193)

    def falling(v: np.ndarray) -> np.ndarray:
        x = v / sc.sqrt_s
        return (1.0 - x) ** sc.continuum_a / x**sc.continuum_b

    w = np.log1p(sc.continuum_shoulder_width)
    mu = np.log(sc.continuum_shoulder_mass) + w * w

    def shoulder(v: np.ndarray) -> np.ndarray:
        return np.exp(-0.5 * ((np.log(v) - mu) / w) ** 2) / v

    f = sc.continuum_shoulder_fraction
    out = np.zeros_like(m)
    inside = (m >= lo) & (m <= hi)
    for part, weight in ((falling, 1.0 - f), (shoulder, f)):
        if weight > 0:
            g = part(grid)
            norm = np.sum(0.5 * (g[1:] + g[:-1]) * np.diff(grid))
            out[inside] += weight * part(m[inside]) / norm
    return out


def _continuum_inverse_cdf(sc: Scenario) -> tuple[np.ndarray, np.ndarray]:
    lo, hi = sc.continuum_range
    m = np.geomspace(lo, hi, 8193)
    pdf = continuum_pdf(m, sc)
    cdf = np.concatenate([[0.0], np.cumsum(0.5 * (pdf[1:] + pdf[:-1]) * np.diff(m))])
    return cdf / cdf[-1], m


def _sample_continuum(rng: np.random.Generator, n: int, table: tuple[np.ndarray, np.ndarray]
                      ) -> np.ndarray:
    cdf, m = table
    return np.interp(rng.uniform(0.0, 1.0, n), cdf, m)


def _decay(rng: np.random.Generator, mass: np.ndarray, sc: Scenario, m_daughter: float
           ) -> tuple[np.ndarray, ...]:
    """Parent kinematics and isotropic two-body decay; returns the two daughters' (px,py,pz,E)."""
    n = mass.size
    scale = sc.parent_pt_scale * np.sqrt(mass / _MZ)
    pt = rng.gamma(sc.parent_pt_shape, 1.0, n) * scale
    y = rng.normal(0.0, sc.parent_y_sigma, n)
    y_max = np.log(sc.sqrt_s / mass)
    y = np.clip(y, -y_max, y_max)
    phi = rng.uniform(-np.pi, np.pi, n)
    mt = np.hypot(pt, mass)
    e_par = mt * np.cosh(y)
    bx, by, bz = pt * np.cos(phi) / e_par, pt * np.sin(phi) / e_par, mt * np.sinh(y) / e_par
    gamma = e_par / mass
    # rest frame: isotropic direction
    p_star = kin.two_body_momentum(mass, m_daughter, m_daughter)
    e_star = np.hypot(p_star, m_daughter)
    cost = rng.uniform(-1.0, 1.0, n)
    sint = np.sqrt(1.0 - cost * cost)
    ph = rng.uniform(-np.pi, np.pi, n)
    qx, qy, qz = p_star * sint * np.cos(ph), p_star * sint * np.sin(ph), p_star * cost
    out = []
    for sign in (1.0, -1.0):
        px, py, pz = sign * qx, sign * qy, sign * qz
        bp = bx * px + by * py + bz * pz
        # Lorentz boost by beta = p/E of the parent; (gamma - 1)/beta^2 = gamma^2/(gamma + 1)
        c = gamma * gamma / (gamma + 1.0) * bp + gamma * e_star
        out.append((px + c * bx, py + c * by, pz + c * bz, gamma * (e_star + bp)))
    return out[0], out[1]


def _polar(px: np.ndarray, py: np.ndarray, pz: np.ndarray) -> tuple[np.ndarray, ...]:
    pt = np.hypot(px, py)
    return pt, np.arcsinh(pz / pt), np.arctan2(py, px)

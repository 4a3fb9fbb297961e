"""Media for the Bethe equation: :class:`Material` (a user's own), :func:`material` (the
built-in table by name, :data:`MATERIALS`) and :func:`mixture` (Bragg additivity)."""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..errors import ConfigError, closest

__all__ = ["MATERIALS", "Material", "material", "mixture"]


@dataclass(frozen=True)
class Material:
    """A medium for the Bethe equation.

    Attributes
    ----------
    name : str
    z_over_a : float
        ⟨Z/A⟩ in mol/g.
    mean_excitation_ev : float
        Mean excitation energy I in eV.
    density : float
        g/cm³ (gases at 20 °C and 1 atm in the built-in table).
    c_bar, x0, x1, a, k, delta0 : float
        Sternheimer's density-effect constants (:math:`\\bar C, X_0, X_1, a, k, \\delta_0`;
        ``delta0 = 0`` for insulators and gases).
    components : tuple of (Material, mass fraction), optional
        For a mixture (see :func:`mixture`): the stopping power is the mass-fraction-weighted
        sum of the components' (Bragg additivity); the constants above are then unused.
    """

    name: str
    z_over_a: float
    mean_excitation_ev: float
    density: float
    c_bar: float = 0.0
    x0: float = 0.0
    x1: float = 0.0
    a: float = 0.0
    k: float = 0.0
    delta0: float = 0.0
    components: tuple[tuple[Material, float], ...] = dataclasses.field(default=(), repr=False)

    def to_dict(self) -> dict[str, Any]:
        """Every constant by its attribute name; a mixture's components as
        ``[material dict, mass fraction]`` pairs."""
        out = {f.name: getattr(self, f.name) for f in dataclasses.fields(self)}
        out["components"] = [[m.to_dict(), w] for m, w in self.components]
        return out

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> Material:
        """The material :meth:`to_dict` wrote."""
        try:
            parts = tuple((cls.from_dict(m), float(w)) for m, w in d.get("components") or ())
            return cls(**{**{k: v for k, v in d.items() if k != "components"},
                          "components": parts})
        except (AttributeError, TypeError, ValueError) as exc:
            raise ConfigError(f"Material.from_dict: not a material written by "
                              f"Material.to_dict ({exc!r})") from None

    def __post_init__(self) -> None:
        if self.components:
            return
        for key in ("z_over_a", "mean_excitation_ev", "density"):
            v = getattr(self, key)
            if not (isinstance(v, (int, float)) and math.isfinite(v) and v > 0):
                raise ConfigError(f"material {self.name!r}: {key} must be a positive number, "
                                  f"got {v!r}")
        for key in ("c_bar", "x0", "x1", "a", "k", "delta0"):
            v = getattr(self, key)
            if not (isinstance(v, (int, float)) and math.isfinite(v)):
                raise ConfigError(f"material {self.name!r}: {key} must be a number, got {v!r}")
        if self.a > 0 and not self.x1 > self.x0:
            raise ConfigError(f"material {self.name!r}: the density-effect constants need "
                              f"x1 > x0, got x0={self.x0}, x1={self.x1}")


# Constants as the PDG atomic and nuclear properties tables list them (Z/A, I in eV, density
# in g/cm³, then C̄, X0, X1, a, k, δ0 of Sternheimer, Berger, Seltzer 1984).  Typed from
# memory, not read from the tables during this work: the digits beyond the third of
# a and k are the least certain; the tests check only the minimum-ionisation values (which
# do not depend on δ for these materials at βγ ≈ 3.5 except for a few per mille in the solids).
_TABLE: dict[str, tuple[float, ...]] = {
    "argon_gas": (0.45059, 188.0, 1.662e-3, 11.9480, 1.7635, 4.4855, 0.19714, 2.9618, 0.0),
    "neon_gas": (0.49555, 137.0, 8.385e-4, 11.9041, 2.0735, 4.6421, 0.08064, 3.5771, 0.0),
    "co2_gas": (0.49989, 85.0, 1.842e-3, 10.1537, 1.6294, 4.1825, 0.11768, 3.3227, 0.0),
    "silicon": (0.49848, 173.0, 2.329, 4.4355, 0.2015, 2.8716, 0.14921, 3.2546, 0.14),
    # liquid water: I = 75.0 eV, the value Sternheimer's C̄ = 3.5017 was computed with
    # (C̄ = 2 ln(I/ħω_p) + 1, ħω_p = 21.469 eV); later tables quote I = 79.7 eV beside the
    # same constants.  With 75.0 eV the minimum is 1.990 MeV cm²/g, with 79.7 eV 1.979.
    "water": (0.55509, 75.0, 1.000, 3.5017, 0.2400, 2.8004, 0.09116, 3.4773, 0.0),
    "copper": (0.45636, 322.0, 8.960, 4.4190, -0.0254, 3.2792, 0.14339, 2.9044, 0.08),
    "iron": (0.46557, 286.0, 7.874, 4.2911, -0.0012, 3.1531, 0.14680, 2.9632, 0.12),
    "lead": (0.39575, 823.0, 11.35, 6.2018, 0.3776, 3.8073, 0.09359, 3.1608, 0.14),
}


def mixture(name: str, parts: Mapping[str, float] | Sequence[tuple[Material | str, float]], *,
            by: str = "volume") -> Material:
    """A mixture of materials by Bragg additivity (PDG Review, same chapter).

    The mass stopping power of the mixture is :math:`\\sum_j w_j (dE/dx)_j` with mass
    fractions :math:`w_j`, each component with its own I and density effect.  ``by="volume"``
    (gas mixtures such as Ar/CO₂ 70/30) converts volume fractions to mass fractions with the
    components' densities; ``by="mass"`` takes mass fractions.  The density is that of the
    mixture (:math:`\\sum_j f_j \\rho_j` by volume).  Using each pure component's density
    effect is an approximation; for gases δ vanishes below βγ ≈ 40 (X₀ ≳ 1.6), so it does not
    matter in the identification range.
    """
    items = list(parts.items()) if isinstance(parts, Mapping) else list(parts)
    if not items:
        raise ConfigError(f"mixture {name!r}: give at least one component")
    mats, fr = [], []
    for m, f in items:
        mats.append(material(m) if isinstance(m, str) else m)
        if not (isinstance(f, (int, float)) and math.isfinite(f) and f > 0):
            raise ConfigError(f"mixture {name!r}: fraction of {getattr(m, 'name', m)!r} must "
                              f"be a positive number, got {f!r}")
        fr.append(float(f))
    f = np.asarray(fr) / sum(fr)
    rho = np.array([m.density for m in mats])
    if by == "volume":
        w = f * rho / np.sum(f * rho)
        density = float(np.sum(f * rho))
    elif by == "mass":
        w = f
        density = float(1.0 / np.sum(w / rho))
    else:
        raise ConfigError(f"mixture {name!r}: by must be 'volume' or 'mass', got {by!r}")
    za = float(np.sum(w * [m.z_over_a for m in mats]))
    # the mixture's I, for display: ln I = Σ w_j (Z/A)_j ln I_j / ⟨Z/A⟩ (Bragg additivity)
    ln_i = float(np.sum(w * [m.z_over_a * math.log(m.mean_excitation_ev) for m in mats]) / za)
    return Material(name, za, math.exp(ln_i), density,
                    components=tuple(zip(mats, map(float, w))))


def material(name: str | Material, *, where: str = "material") -> Material:
    """A material by name from the built-in table (:data:`MATERIALS`), or ``name`` itself."""
    if isinstance(name, Material):
        return name
    if name == "argon_co2_70_30":
        return mixture(name, {"argon_gas": 70.0, "co2_gas": 30.0})
    if name not in _TABLE:
        guess = closest(str(name), MATERIALS)
        hint = f"; did you mean {guess!r}?" if guess else ""
        raise ConfigError(f"{where}: {name!r} is not in the material table; known: "
                          f"{', '.join(MATERIALS)}{hint}; or give your own with z_over_a, "
                          "mean_excitation_ev, density and the density-effect constants")
    za, i_ev, rho, c, x0, x1, a, k, d0 = _TABLE[name]
    return Material(name, za, i_ev, rho, c, x0, x1, a, k, d0)


#: names of the built-in materials (``argon_co2_70_30``: Ar/CO₂ 70/30 by volume)
MATERIALS = (*_TABLE, "argon_co2_70_30")

"""A detector's dE/dx measurement (:class:`DedxResponse`) and the mass hypotheses it
identifies tracks against (:data:`HYPOTHESES`, :func:`hypothesis_mass`).

Which curve the identification uses, and why
---------------------------------------------
The identification compares the measured value with ``scale × ⟨-dE/dx⟩`` (the Bethe *mean*).
A detector reports a truncated mean of its samples, whose centre is not the mean loss but is
proportional to it to good approximation where hypotheses separate (βγ ≲ 3, the 1/β² region):
the calibration ``scale`` absorbs the proportionality.  On the relativistic rise the truncated
mean rises less than the mean (the truncation removes the δ-ray tail that drives part of the
rise); there identification by this curve is only approximate.  No most-probable-value
function is provided.
"""

from __future__ import annotations

import dataclasses
import functools
import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

import numba
import numpy as np
from numpy.typing import ArrayLike

from ..errors import ConfigError, InputError, closest
from .bethe import _f64, mean_energy_loss
from .materials import MATERIALS, Material, material

__all__ = ["HYPOTHESES", "DedxResponse", "hypothesis_mass"]

#: mass hypotheses by name; masses in GeV are looked up by :func:`hypothesis_mass`
HYPOTHESES = ("electron", "pion", "kaon", "proton", "deuteron")


@functools.cache
def _hypothesis_masses() -> dict[str, float]:
    """Masses in GeV: e, π±, K±, p from the `particle` package (PDG tables), d from CODATA."""
    from particle import Particle
    from scipy.constants import physical_constants

    out = {name: Particle.from_pdgid(pid).mass / 1000.0
           for name, pid in (("electron", 11), ("pion", 211), ("kaon", 321), ("proton", 2212))}
    out["deuteron"] = physical_constants["deuteron mass energy equivalent in MeV"][0] / 1000.0
    return out


def hypothesis_mass(name: str, *, where: str = "hypothesis") -> float:
    """Mass in GeV of a hypothesis of :data:`HYPOTHESES` (``where`` names the key in errors)."""
    if name not in HYPOTHESES:
        guess = closest(str(name), HYPOTHESES)
        hint = f"; did you mean {guess!r}?" if guess else ""
        raise ConfigError(f"{where}: {name!r} is not a known mass hypothesis; use one of "
                          f"{', '.join(HYPOTHESES)}{hint}")
    return _hypothesis_masses()[name]


# The curve is tabulated once in ln βγ and interpolated: a few per mille of the Bethe
# evaluation's cost per track, and well below 1e-4 relative error on this grid (tested).
_GRID = np.linspace(math.log(0.05), math.log(2e4), 4001)


@dataclass(frozen=True)
class DedxResponse:
    """A detector's dE/dx measurement and identification against mass hypotheses.

    The expected measured value for a track of momentum p and hypothesis mass M is
    ``scale * mean_energy_loss(p / M, material, mass=M)`` (the detector's units per
    MeV cm²/g).  Its standard deviation is ``resolution * expected``; with
    ``samples_exponent`` set, ``resolution`` is the value at ``reference_samples`` samples and
    scales as ``(reference_samples / n) ** samples_exponent`` for a track with n samples
    (a truncated mean's resolution improves roughly as n^-0.5 -- n^-0.43; common practice).

    Attributes
    ----------
    material : Material or str
    scale : float
        Detector units per MeV cm²/g (fit it with :func:`fit_dedx_response`).
    resolution : float
        Relative resolution σ/⟨dE/dx⟩ (> 0).
    field : str
        The track collection's field holding the measured value.
    samples_field : str or None
        The field holding each track's number of samples (with ``samples_exponent``).
    reference_samples, samples_exponent : float or None
    """

    material: Material | str = "argon_co2_70_30"
    scale: float = 1.0
    resolution: float = 0.07
    field: str = "dedx"
    samples_field: str | None = None
    reference_samples: float | None = None
    samples_exponent: float | None = None
    _tables: dict = dataclasses.field(default_factory=dict, init=False, repr=False,
                                      compare=False)

    def __post_init__(self) -> None:
        object.__setattr__(self, "material", material(self.material))
        for key in ("scale", "resolution"):
            v = getattr(self, key)
            if not (isinstance(v, (int, float)) and not isinstance(v, bool)
                    and math.isfinite(v) and v > 0):
                raise ConfigError(f"dE/dx {key} must be a positive number, got {v!r}")
        with_n = (self.samples_field, self.reference_samples, self.samples_exponent)
        if any(v is not None for v in with_n) and not all(v is not None for v in with_n):
            raise ConfigError("a resolution that depends on the number of samples needs "
                              "samples_field, reference_samples and samples_exponent together")
        if self.reference_samples is not None and not self.reference_samples > 0:
            raise ConfigError(f"reference_samples must be positive, got "
                              f"{self.reference_samples!r}")

    def _curve(self, mass: float) -> np.ndarray:
        t = self._tables.get(mass)
        if t is None:
            t = self.scale * mean_energy_loss(np.exp(_GRID), self.material, mass=mass)
            self._tables[mass] = t
        return t

    def expected(self, momentum: ArrayLike, mass: float) -> np.ndarray:
        """Expected measured dE/dx (detector units) at momentum p (GeV) for mass M (GeV)."""
        lbg = np.log(_f64(momentum) / float(mass))
        out = np.interp(lbg, _GRID, self._curve(float(mass)))
        self._off_grid(out, lbg, float(mass))
        return out

    def _off_grid(self, out: np.ndarray, lbg: np.ndarray, mass: float) -> None:
        """Outside the table (tracks below βγ = 0.05 or above 2e4, rare): the formula."""
        off = ~((lbg >= _GRID[0]) & (lbg <= _GRID[-1]))
        if np.any(off):
            b = np.exp(lbg[off])
            out[off] = self.scale * mean_energy_loss(b, self.material, mass=mass)

    def relative_sigma(self, samples: ArrayLike | None = None) -> np.ndarray | float:
        """σ/expected: ``resolution``, or its value for ``samples`` samples per track."""
        if self.samples_exponent is None or samples is None:
            return self.resolution
        n = np.maximum(_f64(samples), 1.0)
        return self.resolution * (self.reference_samples / n) ** self.samples_exponent

    def deviation(self, hypothesis: str | float, momentum: ArrayLike, measured: ArrayLike,
                  samples: ArrayLike | None = None) -> np.ndarray:
        """Standardised deviation (measured - expected) / σ under a mass hypothesis.

        ``hypothesis`` is a name of :data:`HYPOTHESES` or a mass in GeV.
        """
        m = hypothesis if isinstance(hypothesis, (int, float)) else hypothesis_mass(hypothesis)
        e = self.expected(momentum, float(m))
        return (_f64(measured) - e) / (self.relative_sigma(samples) * e)

    def deviation_of(self, hypothesis: str | float, get: Callable[[str], Any],
                     where: str = "the tracks") -> np.ndarray:
        """:meth:`deviation` for a collection given by ``get(field)`` (flat columns pt, eta,
        the measured field and the samples field); a missing field is an InputError."""
        def col(name: str) -> np.ndarray:
            try:
                return _f64(get(name))
            except KeyError:
                raise InputError(f"{where} has no field {name!r} needed for dE/dx "
                                 f"identification; name the measured field in the dE/dx "
                                 "settings (field / samples_field) or add it to the data"
                                 ) from None
        m = float(hypothesis if isinstance(hypothesis, (int, float))
                  else hypothesis_mass(hypothesis))
        pt, eta, d = (np.ascontiguousarray(col(f)) for f in ("pt", "eta", self.field))
        with_n = self.samples_field is not None and self.samples_exponent is not None
        n = np.ascontiguousarray(col(self.samples_field)) if with_n else pt  # type: ignore[arg-type]
        out = np.empty(pt.size)
        lbg = np.empty(pt.size)
        # one pass per track (the identification's cost is per track, before any pair)
        _deviation_kernel(pt, eta, d, n, with_n, m, _GRID[0], 1.0 / (_GRID[1] - _GRID[0]),
                          self._curve(m), float(self.resolution),
                          float(self.reference_samples or 1.0),
                          float(self.samples_exponent or 0.0), out, lbg)
        off = ~((lbg >= _GRID[0]) & (lbg <= _GRID[-1]))
        if np.any(off):
            e = np.empty(int(off.sum()))
            self._off_grid(e, lbg[off], m)
            rel = self.relative_sigma(n[off] if with_n else None)
            out[off] = (d[off] - e) / (rel * e)
        return out

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready; the material by name when it is the built-in one of that name, else
        with every constant (:meth:`Material.to_dict`), so :meth:`from_dict` gives it back."""
        m = self.material
        builtin = m.name in MATERIALS and material(m.name) == m
        return {"material": m.name if builtin else m.to_dict(), "scale": self.scale,
                "resolution": self.resolution, "field": self.field,
                "samples_field": self.samples_field,
                "reference_samples": self.reference_samples,
                "samples_exponent": self.samples_exponent}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> DedxResponse:
        """The response :meth:`to_dict` wrote."""
        try:
            mat = d["material"]
            return cls(material(mat) if isinstance(mat, str) else Material.from_dict(mat),
                       **{k: d[k] for k in ("scale", "resolution", "field", "samples_field",
                                            "reference_samples", "samples_exponent")})
        except (KeyError, TypeError) as exc:
            raise ConfigError(f"DedxResponse.from_dict: not a response written by "
                              f"DedxResponse.to_dict ({exc!r})") from None


@numba.njit(cache=True, nogil=True)
def _deviation_kernel(pt, eta, meas, samples, with_n, mass, g0, inv_dg, table, rel0, nref,
                      expo, out, lbg):  # pragma: no cover - compiled
    """(measured - expected) / sigma per track, the curve interpolated linearly on the uniform
    ln(betagamma) table; ``lbg`` receives ln(p/M) so the caller can redo off-table tracks."""
    last = table.size - 1
    for k in range(pt.size):
        p = np.float64(pt[k]) * np.cosh(np.float64(eta[k]))
        x = np.log(p / mass)
        lbg[k] = x
        u = (x - g0) * inv_dg
        if not (u >= 0.0 and u <= last):
            out[k] = np.nan
            continue
        i = min(int(u), last - 1)
        e = table[i] + (u - i) * (table[i + 1] - table[i])
        rel = rel0
        if with_n:
            r = nref / max(np.float64(samples[k]), 1.0)
            rel = rel0 * (np.sqrt(r) if expo == 0.5 else r**expo)  # sqrt: the usual case
        out[k] = (np.float64(meas[k]) - e) / (rel * e)

"""Matching a fitted peak to known particles (PDG tables via the ``particle`` package).

Use :func:`match_known` when you have a peak mass (and its uncertainty) and want to know
which known states could sit there.  It returns :class:`KnownMatch` records, nearest first;
an empty list means "no known particle matches".

What counts as a match
----------------------
A known particle of mass :math:`M \\pm \\delta M` and natural width :math:`\\Gamma` matches a
peak at :math:`m` with fit error :math:`\\sigma_{fit}` and detector resolution
:math:`\\sigma_{res}` when

.. math::

    d = \\frac{|m - M|}{\\sqrt{\\sigma_{fit}^2 + \\sigma_{res}^2 + (\\Gamma/2)^2 + \\delta M^2}}
    \\le n_\\sigma \\quad (\\text{default } 3),

its width fits the peak's, when the fit measured one (so that a peak a few MeV wide is not
matched to a state hundreds of MeV wide that happens to be centred near it):

* a fitted natural width :math:`\\Gamma_{fit} \\pm \\delta\\Gamma_{fit}` (Breit-Wigner, Voigt): the
  tables' width range :math:`[\\Gamma - \\delta\\Gamma_-, \\Gamma + \\delta\\Gamma_+]` must overlap the
  fit's interval :math:`\\Gamma_{fit} \\pm n_\\sigma \\delta\\Gamma_{fit}` (for broad states the tables'
  errors are the range of the estimates, e.g. 100-800 MeV, not Gaussian errors to be scaled);
* a fitted Gaussian width :math:`\\sigma_{fit} \\pm \\delta\\sigma_{fit}` (no natural width in the
  fit) bounds the state's full width from above, since a resonance cannot make a peak much
  narrower than itself: :math:`\\Gamma - \\delta\\Gamma_- \\le 2 \\cdot 2\\sqrt{2\\ln 2}\\,
  (\\sigma_{fit} + n_\\sigma\\,\\delta\\sigma_{fit})`.  A Gaussian (plus a linear background)
  fitted to a Breit-Wigner comes out with 0.95-1.3 times its FWHM for windows of 1.5-10
  times Γ (least squares, checked numerically), and a Gaussian matching the Breit-Wigner's
  curvature at the top with 0.83 times: the factor 2 keeps every true match in;

and its electric charge fits the pair: a neutral state for an opposite-charge pair, charge
:math:`\\pm 2` for a same-sign pair, any charge when the pair charge is not known.  The natural
width enters as the half width at half maximum, :math:`\\Gamma/2`, the Breit-Wigner's
counterpart of a standard deviation (the Breit-Wigner has no finite variance; common practice).

Entries the tables list but which are not observable resonances are skipped: nuclei, quarks and
diquarks, generator-specific and technicolour codes, states without a measured mass, and
states the tables mark as "further states" or not in the particle data tables.  A particle and
its antiparticle appear once (the particle, positive PDG id).
"""

from __future__ import annotations

import functools
import math
from dataclasses import asdict, dataclass
from typing import Any

from .errors import InputError

__all__ = ["KnownMatch", "fitted_widths", "lookup", "match_known", "pair_charge"]


@dataclass(frozen=True)
class KnownMatch:
    """One known particle near a peak.

    Attributes
    ----------
    name : str
        Name in the particle-data tables (e.g. ``"Z0"``).
    pdgid : int
        Particle-data-group Monte Carlo code.
    mass, mass_error : float
        Tabulated mass and its (symmetrised) uncertainty, GeV.
    width : float
        Tabulated natural width, GeV (0 when the tables give none).
    charge : float
        Electric charge in units of the elementary charge.
    distance_sigma : float
        :math:`|m - M|` in units of the combined standard deviation (see module guide).
    """

    name: str
    pdgid: int
    mass: float
    mass_error: float
    width: float
    charge: float
    distance_sigma: float

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready, every key the attribute of the same name."""
        return asdict(self)

    @classmethod
    def from_dict(cls, d: Any) -> KnownMatch:
        """The match :meth:`to_dict` wrote (a missing number comes back as NaN)."""
        def num(k: str) -> float:
            return math.nan if d.get(k) is None else float(d[k])

        try:
            return cls(name=str(d["name"]), pdgid=int(d["pdgid"]), mass=num("mass"),
                       mass_error=num("mass_error"), width=num("width"), charge=num("charge"),
                       distance_sigma=num("distance_sigma"))
        except (KeyError, TypeError, ValueError) as exc:
            raise InputError(f"not a known-particle match written by KnownMatch.to_dict: "
                             f"{exc!r}") from None


@dataclass(frozen=True)
class _Entry:
    name: str
    pdgid: int
    mass: float
    mass_error: float
    width: float
    width_low: float   # the tables' width range, GeV (both ``width`` when no errors)
    width_high: float
    charge: float


def _keep(p: Any) -> bool:
    from particle.particle.enums import Status

    pid = p.pdgid
    if p.mass is None or not pid.is_valid:
        return False
    if pid.is_nucleus or pid.is_quark or pid.is_diquark:
        return False
    if pid.is_generator_specific or pid.is_technicolor:
        return False
    return p.status not in (Status.Further, Status.NotInPDT)


def _particles() -> list[Any]:
    """The particle tables' entries as ``particle.Particle`` objects.

    The package's default table is its newest ``particle<year>.csv`` followed by some six
    thousand nuclei, which :func:`_keep` always drops: reading the particle file alone (into
    a subclass, so that the class-wide table a user may rely on is neither loaded nor
    changed) gives the same entries at a tenth of the cost (~0.03 s instead of ~0.3 s of a
    search's start; ``tests/test_resonances.py`` compares the two).  A table the user loaded
    is used as it is."""
    from particle import Particle
    from particle.data import basepath

    files = sorted(f.name for f in basepath.iterdir()
                   if f.name.startswith("particle") and f.name.endswith(".csv"))
    if Particle.table_loaded() or not files:
        return list(Particle.all())

    class _PackageTable(Particle):  # (class state of its own: Particle's stays untouched)
        pass

    with basepath.joinpath(files[-1]).open() as f:
        _PackageTable.load_table(f)
    return list(_PackageTable.all())


@functools.lru_cache(maxsize=1)
def _table() -> tuple[_Entry, ...]:
    seen: set[int] = set()
    out: list[_Entry] = []
    for p in sorted(_particles(), key=lambda q: (abs(int(q.pdgid)), -int(q.pdgid))):
        key = abs(int(p.pdgid))
        if key in seen or not _keep(p):  # seen: the antiparticle of one already listed
            continue
        seen.add(key)
        up = p.mass_upper if p.mass_upper is not None else 0.0
        lo = p.mass_lower if p.mass_lower is not None else up
        out.append(
            _Entry(
                name=str(p.name),
                pdgid=int(p.pdgid),
                mass=float(p.mass) / 1000.0,  # the tables use MeV
                mass_error=0.5 * (float(up) + float(lo)) / 1000.0,
                width=(float(p.width) / 1000.0) if p.width is not None else 0.0,
                width_low=(float(p.width or 0.0) - float(p.width_lower or 0.0)) / 1000.0,
                width_high=(float(p.width or 0.0) + float(p.width_upper or 0.0)) / 1000.0,
                charge=float(p.charge) if p.charge is not None else 0.0,
            )
        )
    return tuple(out)


def lookup(name: str) -> KnownMatch:
    """Return the table entry of a particle by its table name (e.g. ``"Z0"``), distance 0.

    Raises
    ------
    peaksift.errors.ConfigError
        When no particle of that name exists; the message suggests the closest name.
    """
    from .errors import ConfigError, closest

    for e in _table():
        if e.name == name:
            return KnownMatch(e.name, e.pdgid, e.mass, e.mass_error, e.width, e.charge, 0.0)
    names = [e.name for e in _table()]
    hint = closest(name, names)
    raise ConfigError(
        f"no known particle named {name!r} in the particle-data tables"
        + (f"; did you mean {hint!r}?" if hint else "; use the tables' name, e.g. 'Z0' or 'J/psi(1S)'")
    )


def pair_charge(charge_rule: str | None) -> int | None:
    """Charge of a pair from the pairing rule: ``"opposite"`` -> 0, ``"same"`` -> 2, else None."""
    if charge_rule == "opposite":
        return 0
    if charge_rule == "same":
        return 2
    return None


def match_known(
    mass: float,
    *,
    error: float = 0.0,
    resolution: float = 0.0,
    charge: int | None = 0,
    n_sigma: float = 3.0,
    width: tuple[float, float] | None = None,
    sigma: tuple[float, float] | None = None,
) -> list[KnownMatch]:
    """Known particles compatible with a peak at ``mass`` GeV, nearest first.

    Parameters
    ----------
    mass : float
        Peak mass in GeV.
    error : float
        Fit uncertainty of the peak mass, GeV.
    resolution : float
        Detector mass resolution at the peak (Gaussian sigma), GeV.
    charge : int or None
        Total charge of the pair: 0 for opposite-charge pairs, 2 (matched as ``|q| = 2``) for
        same-sign pairs, None for any charge.
    n_sigma : float
        Matching distance in combined standard deviations (module guide).
    width : (float, float) or None
        The peak's fitted natural width and its error, GeV, when the fit measured one.
    sigma : (float, float) or None
        The peak's fitted Gaussian width and its error, GeV, when the fit has no natural
        width (ignored when ``width`` is given).

    Returns
    -------
    list of KnownMatch
        Sorted by ``distance_sigma``; empty when nothing matches.
    """
    m = float(mass)
    if not math.isfinite(m) or m <= 0:
        return []
    out: list[KnownMatch] = []
    base = float(error) ** 2 + float(resolution) ** 2
    for e in _table():
        if charge is not None and abs(abs(e.charge) - abs(charge)) > 1e-9:
            continue
        s2 = base + (0.5 * e.width) ** 2 + e.mass_error**2
        if s2 <= 0:
            continue
        d = abs(m - e.mass) / math.sqrt(s2)
        if d <= n_sigma and _widths_agree(e, width, sigma, n_sigma):
            out.append(KnownMatch(e.name, e.pdgid, e.mass, e.mass_error, e.width, e.charge, d))
    out.sort(key=lambda k: (k.distance_sigma, k.pdgid))
    return out


#: full width at half maximum of a Gaussian over its standard deviation
_FWHM_PER_SIGMA = 2.0 * math.sqrt(2.0 * math.log(2.0))


def _widths_agree(e: _Entry, width: tuple[float, float] | None,
                  sigma: tuple[float, float] | None, n_sigma: float) -> bool:
    """The module guide's width rule (True when the fit measured no width)."""
    if width is not None and all(math.isfinite(float(v)) for v in width):
        reach = n_sigma * abs(float(width[1]))
        return e.width_low <= float(width[0]) + reach and e.width_high >= float(width[0]) - reach
    if sigma is not None and all(math.isfinite(float(v)) for v in sigma):
        return e.width_low <= 2.0 * _FWHM_PER_SIGMA * (abs(float(sigma[0]))
                                                       + n_sigma * abs(float(sigma[1])))
    return True


def fitted_widths(parameters: Any) -> dict[str, tuple[float, float]]:
    """``width=`` / ``sigma=`` for :func:`match_known` from a fit's parameters as results.json
    lists them (``{"width": {"value", "error", "fixed"}, ...}``): a parameter held fixed
    measured nothing and is left out."""
    out: dict[str, tuple[float, float]] = {}
    for name in ("width", "sigma"):
        p = parameters.get(name) if hasattr(parameters, "get") else None
        if not hasattr(p, "get") or p.get("fixed"):
            continue
        v, err = p.get("value"), p.get("error")
        if isinstance(v, (int, float)) and isinstance(err, (int, float)) and err > 0:
            out[name] = (float(v), float(err))
    return out

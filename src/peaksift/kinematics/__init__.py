"""Four-vector arithmetic on plain numpy arrays.

Every function here takes and returns numpy arrays (or anything ``numpy.asarray``
accepts, including flat awkward contents) and broadcasts like a ufunc.  Energies,
momenta and masses are in GeV; angles in radians.

Which function to use (each importable from here; its module in brackets)
--------------------------------------------------------------------------
* From detector coordinates to components: :func:`to_cartesian`; back again:
  :func:`from_cartesian` (``vectors``).
* Mass of a summed four-vector (what the pairing rules other than ``choose="all"`` use):
  :func:`invariant_mass` (``vectors``).  For exactly two objects given as (pt, eta, phi,
  mass), :func:`pair_mass` (and :func:`pair_kinematics`: mass, pT and rapidity of the pair)
  is free of cancellation, even for nearly collinear pairs; its building blocks
  :func:`polar_object_terms`, :func:`half_angle_squares` and :func:`polar_pair_terms` also
  run inside numba kernels (the pairing layer's ``choose="all"`` path) (``pairs``).
* Angles and shapes of an event: :func:`rapidity`, :func:`pseudorapidity`,
  :func:`delta_phi` (wrapped into [-pi, pi)), :func:`delta_r`, :func:`transverse_mass`
  (``vectors``).
* Decays and thresholds: :func:`two_body_momentum`, :func:`sqrt_s_collider`,
  :func:`sqrt_s_fixed_target`, :func:`threshold_beam_energy` (``collisions``).

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

from .collisions import (
    sqrt_s_collider,
    sqrt_s_fixed_target,
    threshold_beam_energy,
    two_body_momentum,
)
from .pairs import (
    half_angle_squares,
    pair_kinematics,
    pair_mass,
    polar_object_terms,
    polar_pair_terms,
)
from .vectors import (
    delta_phi,
    delta_r,
    from_cartesian,
    invariant_mass,
    mass_squared,
    pseudorapidity,
    rapidity,
    to_cartesian,
    transverse_mass,
)

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

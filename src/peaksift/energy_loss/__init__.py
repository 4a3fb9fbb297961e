"""Mean energy loss of charged particles (Bethe) and particle identification by dE/dx.

What to use when
----------------
* :func:`mean_energy_loss` -- the mass stopping power ⟨-dE/dx⟩ in MeV cm²/g of a material at
  given βγ (or :func:`mean_energy_loss_at` at given momentum and mass).  Vectorised.
* :func:`material` -- a material of the built-in table by name (:data:`MATERIALS`);
  :class:`Material` for a user-given one; :func:`mixture` for a mixture by Bragg additivity.
* :func:`max_energy_transfer` and :func:`density_correction` -- the two ingredients of the
  Bethe equation, public for checks and plots.
* :class:`DedxResponse` -- a detector's dE/dx measurement: the Bethe curve in the detector's
  units (an overall ``scale``), a relative ``resolution`` (a number, or a function of the
  number of samples on the track) and the standardised deviation of a measured value from a
  mass hypothesis (:meth:`DedxResponse.deviation`).  :func:`fit_dedx_response` fits the scale
  (and optionally the resolution) from tracks of one clean species.
* :data:`HYPOTHESES` and :func:`hypothesis_mass` -- the mass hypotheses (electron, pion,
  kaon, proton, deuteron) by name.

Where they live: :mod:`.bethe` (the equation), :mod:`.materials` (the media),
:mod:`.response` (the detector's measurement and the mass hypotheses), :mod:`.calibration`
(the fit of its scale and resolution).
"""

from __future__ import annotations

from .bethe import (
    K_BETHE,
    density_correction,
    max_energy_transfer,
    mean_energy_loss,
    mean_energy_loss_at,
)
from .calibration import DedxFit, fit_dedx_response
from .materials import MATERIALS, Material, material, mixture
from .response import HYPOTHESES, DedxResponse, hypothesis_mass

__all__ = [
    "HYPOTHESES",
    "K_BETHE",
    "MATERIALS",
    "DedxFit",
    "DedxResponse",
    "Material",
    "density_correction",
    "fit_dedx_response",
    "hypothesis_mass",
    "material",
    "max_energy_transfer",
    "mean_energy_loss",
    "mean_energy_loss_at",
    "mixture",
]

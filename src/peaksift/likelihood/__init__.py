"""The one likelihood core under every fit, scan, significance, limit and toy.

What is here, and which piece to use when
-----------------------------------------
* :mod:`.poisson`     -- pure functions on stacked arrays: the extended binned Poisson NLL
  (scaled Poisson for weighted bins), its gradient and Fisher information, the Baker-Cousins
  goodness of fit, the extended unbinned NLL.  Stats code with templates of its own (scans
  over many masses, batched toys) calls these directly.
* :mod:`.constraints` -- Gaussian and log-normal constraint terms for nuisance parameters.
* :mod:`.nuisances`   -- :class:`SignalNuisances`: the signal's mass-scale, resolution,
  luminosity and efficiency factors with their constraints (absent at size 0).
* :mod:`.model`       -- :class:`Model`: signal component(s) + background with yields on a
  window; expected bin contents and densities from the shapes.
* :mod:`.cost`        -- :class:`BinnedCost` (and :mod:`.unbinned_cost`, :class:`UnbinnedCost`):
  a Model on data, over its free parameters, with constraints (value, gradient,
  information, observed Hessian; the value alone for MIGRAD where that is cheaper); what
  both share (free <-> full vector, constraints, iminuit's protocol) in :mod:`.cost_base`.
* :mod:`.kernels`     -- compiled (numba) fast path of :class:`BinnedCost` for the common
  shapes, the coarse scan and small Newton solves; the numpy path is the reference
  (``PEAKSIFT_NUMPY_COST=1`` selects it everywhere).
* :mod:`.derived`     -- :class:`Tie`, :class:`TiedCost`: a parameter computed from another
  inside the cost (sigma = resolution(mass)), with the chain rule in every derivative.
* :mod:`.joint`       -- :class:`JointCost`: several channels' costs as one (the product of
  their likelihoods) over shared free parameters, e.g. one cross-section x branching fraction.
* :mod:`.minimize`    -- the one minimiser (damped Fisher scoring; iminuit MIGRAD as the
  fallback), the scaled positive-definiteness test, and :func:`minimize_stacked`, the driver
  of every stacked fit (many toys or mass hypotheses at once); :mod:`.migrad` the watched
  MIGRAD fallback, :mod:`.minimum` what a minimisation found, :mod:`.refine` a minimum's
  polish, Hessian, final Newton stage (compiled in :mod:`.driver_newton`) and covariance.
* :mod:`.starts`      -- starting values: sideband background fits and candidate peak masses
  from a coarse likelihood scan.

:func:`peaksift.fit` (module :mod:`peaksift.fitting`) is the free fit built on these.
"""

from __future__ import annotations

from .constraints import CONSTRAINT_KINDS, Constraint
from .cost import BinnedCost
from .derived import Tie, TiedCost, resolution_tie
from .joint import JointCost
from .minimize import (
    Minimum,
    NearMinimum,
    StackedMinimum,
    covariance,
    damped_step,
    first_error,
    minimize,
    minimize_stacked,
    new_minuit,
)
from .model import Model
from .nuisances import NUISANCE_NAMES, SignalNuisances
from .poisson import (
    MU_FLOOR,
    baker_cousins_chi2,
    binned_gradient,
    binned_information,
    binned_nll,
    saturated_term,
    unbinned_nll,
)
from .refine import refine
from .unbinned_cost import UnbinnedCost

__all__ = [
    "CONSTRAINT_KINDS",
    "MU_FLOOR",
    "NUISANCE_NAMES",
    "BinnedCost",
    "Constraint",
    "JointCost",
    "Minimum",
    "Model",
    "NearMinimum",
    "SignalNuisances",
    "StackedMinimum",
    "Tie",
    "TiedCost",
    "UnbinnedCost",
    "baker_cousins_chi2",
    "binned_gradient",
    "binned_information",
    "binned_nll",
    "covariance",
    "damped_step",
    "first_error",
    "minimize",
    "minimize_stacked",
    "new_minuit",
    "refine",
    "resolution_tie",
    "saturated_term",
    "unbinned_nll",
]

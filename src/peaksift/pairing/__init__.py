"""Pair building and candidate choice: from events to flat di-object candidates.

Use :func:`pair` to turn events into :class:`Candidates` (flat numpy columns: mass, pT and
rapidity of each pair, event weight, event index, the two object indices) with a cut flow.
Use :meth:`Candidates.concatenate` to join chunks, :meth:`Candidates.in_window` to keep a
mass window.

What :func:`pair` does, in order
--------------------------------
1. ``event_cut`` (text over per-event scalars and ``n_<collection>`` counts, a callable or
   a mask; see :mod:`peaksift.cuts`) selects events.
2. ``cut`` selects objects of ``first``; ``second_cut`` selects objects of ``second``.  For
   two different collections each cut applies to its own collection only (``second_cut=None``
   means no requirement on the second collection's objects).
3. Pairs are formed inside each event from the selected objects:

   * one collection: every unordered pair ``i < j`` (``first_index < second_index``);
   * two collections: every ``(i, j)`` with ``i`` in ``first`` and ``j`` in ``second``.

   Within an event, pairs come in lexicographic order of ``(first_index, second_index)``;
   events come in order.  Object indices always refer to the collection as read (before
   any cut).
4. Pair requirements: ``charge="opposite"`` keeps pairs with one charge positive and the
   other negative, ``"same"`` pairs with both positive or both negative (a neutral object,
   ``q = 0``, or a NaN charge passes neither); ``min_delta_r`` keeps
   pairs with :math:`\\Delta R \\ge` ``min_delta_r`` (overlap removal).
5. ``choose`` decides what each event contributes among the pairs that passed:

   * ``"all"``: every pair (``Candidates.multiplicity`` then gives, for each candidate, the
     number of candidates its event contributed);
   * ``"leading"``: the pair whose harder object has the highest pT; if equal, the pair
     whose softer object has the higher pT;
   * ``"max_sum_pt"``: the pair with the highest scalar sum ``pT_i + pT_j``;
   * ``"closest"``: the pair whose mass is nearest ``target_mass`` (smallest
     ``|m - target_mass|``).

   Ties (exactly equal keys) go to the pair that comes first in the order of step 3, i.e.
   the lowest ``first_index``, then the lowest ``second_index``.  A pair whose key is NaN
   is never chosen.

Mass hypotheses per leg and dE/dx identification
-------------------------------------------------
``hypotheses="kaon"`` or ``("kaon", "pion")`` gives each leg the mass of a hypothesis of
:data:`peaksift.energy_loss.HYPOTHESES` (replacing the collection's mass field) and computes
the invariant mass with those masses.  ``identification`` (a
:class:`peaksift.energy_loss.DedxResponse`) lets the cuts use ``dedx_deviation(kaon)``.
For two *different* hypotheses on one collection, ``cut`` selects the first leg and
``second_cut`` the second, and pairs are ordered: ``(i, j)`` with ``i`` passing ``cut``, ``j``
passing ``second_cut``, ``i != j``.  When both objects pass both selections the pair has two
assignments (Kπ and πK); ``assignment`` decides what is kept:

* ``"both"``: both, as two candidates (each with its own mass);
* ``"more_probable"``: the one with the smaller
  :math:`z_{1}(i)^2 + z_{2}(j)^2` (z: the standardised dE/dx deviations under each leg's
  hypothesis), i.e. the larger Gaussian likelihood with equal prior abundances; on a tie,
  the one whose first leg comes first in the collection.

With ``choose="all"`` (and no ``min_delta_r``) each pair's mass, pT and rapidity come
straight from the objects' polar coordinates through the formulas of
:func:`peaksift.kinematics.pair_kinematics` (sums of non-negative terms: no cancellation
for nearly collinear or back-to-back pairs; one exponential per object, one polynomial sine
and one logarithm per pair), evaluated inside the kernel by the same functions
(:func:`~peaksift.kinematics.polar_object_terms`,
:func:`~peaksift.kinematics.half_angle_squares`,
:func:`~peaksift.kinematics.polar_pair_terms`).  The other rules add four-vectors in
Cartesian components (:func:`peaksift.kinematics.to_cartesian`, once per object) and take
:func:`peaksift.kinematics.invariant_mass`, :func:`peaksift.kinematics.rapidity` and
:math:`\\sqrt{p_x^2 + p_y^2}` of the sum (PDG Review, "Kinematics").  Both agree to
rounding (about 1e-15 relative for ordinary pairs; the polar form is the more precise one
for nearly collinear pairs).

Implementation: all work is on flat numpy columns (collection offsets + contents).  The
pair loops run in small numba kernels (compiled once, cached on disk).  Numba was chosen
because pairing inside variable-length events is naturally a loop: in numpy every step
(pair index generation with repeat/cumsum tricks, the charge mask, gathers of both objects'
components, the sums) is a separate full-size array, while a kernel counts, tests charges
and adds the four-vectors in one pass.  ``scripts/bench_pairing.py`` measures the result
against a hand-written vector + awkward selection.
"""

from __future__ import annotations

from .build import load_kernels, pair, warm_cache
from .candidates import ASSIGNMENT_RULES, CHOOSE_RULES, Candidates

__all__ = ["ASSIGNMENT_RULES", "CHOOSE_RULES", "Candidates", "load_kernels", "pair", "warm_cache"]

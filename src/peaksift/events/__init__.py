"""Reading reconstructed events from Parquet files into awkward arrays.

Which function to use
---------------------
* :func:`read_events` -- the whole data set as one ``awkward.Array`` (small and medium data).
* :func:`iter_events` -- the same, streamed in chunks of whole Parquet row groups, so memory
  stays bounded whatever the size of the data set.
* :func:`plan_chunks` + :func:`read_chunk` -- picklable chunk descriptions that workers read
  themselves (this is what :mod:`peaksift.execution` uses); :func:`check_files` checks all
  files' schemas against the request once, up front, from the footers.
* :func:`describe` -- what a set of files holds (``peaksift inspect`` prints it).
* :func:`list_files` -- resolve paths, globs, directories and lists to a sorted list of files.

What comes back
---------------
One record field per object collection (``muon``, ``electron``, ``track``, ...), each a jagged
array of records with vector's ``Momentum4D`` behaviour, so ``(ev.muon[:, 0] +
ev.muon[:, 1]).mass`` works.  Every collection carries the fields ``pt, eta, phi, mass``
(GeV, radians) followed by the file's other object fields (``charge``, ``isolation``, ...).
Per-event scalars (``weight``, run and event numbers, ...) are top-level fields.

Files may store a collection in either layout:

* one list-of-struct column: ``muon: list<struct<pt, eta, phi, mass, charge>>``;
* sibling list columns named ``<collection>_<field>``: ``muon_pt, muon_eta, ...``.

and its kinematics as ``(pt, eta, phi[, mass])`` or ``(px, py, pz, energy)`` (``m`` and ``e``
are accepted as short names).  Cartesian kinematics are converted to ``pt, eta, phi, mass``
(float64) and the cartesian fields are not kept as fields: vector computes ``.px``, ``.E``, ...
from the record.  A collection without a mass field is **massless** unless a mass is given with
``masses={"muon": 0.1056584}``.  Other object fields whose names vector would read as a
second set of coordinates (``x, y, z, t, rho, theta, tau, m, M, E, e, energy, px, py, pz``) are
renamed ``raw_<name>``.

Input repairs
-------------
Objects with NaN or infinite kinematics, negative pt, negative energy, energy below momentum
(beyond rounding) or a negative mass (beyond rounding; rounding-level values become 0) are
dropped, and one :class:`~peaksift.errors.DataWarning` per call reports how many of each, per
collection.  ``strict=True`` raises :class:`~peaksift.errors.InputError` instead.  Every
schema problem is checked from the file footers before any data are read.

Chunks are made of whole row groups: a chunk holds at least ``chunk_events`` events unless the
file ends first, and a row group larger than ``chunk_events`` is a chunk on its own.
"""

from __future__ import annotations

import vector

from .describe import Description, describe
from .files import DEFAULT_CHUNK_EVENTS, list_files
from .read import ChunkSpec, check_files, iter_events, plan_chunks, read_chunk, read_events

vector.register_awkward()

__all__ = [
    "DEFAULT_CHUNK_EVENTS",
    "ChunkSpec",
    "Description",
    "check_files",
    "describe",
    "iter_events",
    "list_files",
    "plan_chunks",
    "read_chunk",
    "read_events",
]

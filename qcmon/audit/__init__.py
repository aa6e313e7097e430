"""Audit finished sessions in batch: a lab's archive, and the same fields of view imaged over days.

What is a session
-----------------
Under each ROOT, a folder is a session when it directly holds frame files: ``*.tif`` / ``*.tiff`` (except
reference z-stacks named ``zstack*.tif``), or raw streams (``*.raw``, ``*.bin``, ``*.dat``) with a sidecar
``.toml`` (``run.raw.toml`` or ``run.toml``). An empty folder with no subfolders is listed too, as a session
that could not be read (an acquisition that wrote nothing is worth seeing). Never sessions, and never entered:
qcmon's own output (folders named ``*.qcmon``, any folder holding a ``summary.json`` written by qcmon), the
audit's ``--out`` folder and hidden folders. A ``zstack*.tif`` in the session folder or its parent is used as the
session's reference z-stack. A container file is a session too, once per image series it holds: an NWB file
(``*.nwb``) with a two-photon or one-photon series in ``/acquisition``, an HDF5 file (``*.h5``, ``*.hdf5``) or a
Zarr store (``*.zarr``, never entered) holding a dataset of 3 to 5 axes (see :mod:`qcmon.sources.arrays`); its
path is the file's, followed by ``/SERIES`` when the file holds several. A container that cannot be opened is
listed as a session that could not be read. Paths in every output are relative to the ROOT (prefixed by the ROOT's name when
several roots are given). Nothing is ever written into the ROOTs.

What it writes (``--out DIR``)
------------------------------
- ``sessions/<path>.qcmon/``: each session's record (``traces.csv``, ``events.jsonl``, ``summary.json``,
  ``report.html``, ``exclude.csv``, ``reference.tif``), measured by :class:`qcmon.monitor.loop.Monitor` with
  ``follow=False``: the same engine as the live watch.
- ``sessions/<path>.qcmon.json``: the manifest the record was made from: names, sizes and modification times of
  the frame files (and z-stack), qcmon version, profile name and SHA-256 of its resolved limits, and the
  acquisition options. When it is unchanged the record is reused and no frame is read (``--remeasure`` forces).
- ``audit.csv``: a row per session (columns in :data:`qcmon.audit.AUDIT_COLUMNS`, units in the names); a session
  that could not be read has ``status`` and ``verdict`` ``error`` and its message in ``error``.
- ``chronic.csv``: the sessions of each field of view imaged more than once, by date (columns in
  :data:`qcmon.audit.CHRONIC_COLUMNS`).
- ``audit.html``: self-contained (inline CSS, JS and images), sortable tables, a small plot of displacement and
  brightness per session, relative links to each ``report.html``, and the chronic section.

Chronic imaging
---------------
Sessions of one field are grouped by ``--group-by REGEX`` on the relative path, or else by matching reference
images: a session joins the field whose latest session's reference correlates with its own, after
phase-correlation registration, at ``--same-field-corr`` (default 0.8) or more. A session's date is the last
ISO date in its relative path (``2026-11-03``, optionally with a time ``T14-05``), else the earliest modification
time of its frame files (UTC); ``date_origin`` says which. For each field, the shift of the reference image
against the previous session (µm; content shift, + toward increasing column/row) and from the first session, and
least-squares trends per day of the baseline brightness above the dark level (as % of the first day's fitted value
per week), SNR, photons per pixel and RMS motion. A field is flagged ``field_shift`` when it moved more than
``--shift-limit`` µm (default 10) between consecutive sessions, and ``dimming`` when its brightness trend is below
minus ``--fade-limit`` %/week (default 10).

Exit status
-----------
0: every session passed its profile (warnings allowed) and no field was flagged; 1: a session failed its
profile or could not be read, or a field was flagged over days; 2: usage or configuration error (bad option,
unknown profile, a ROOT that is not a folder). ``--no-fail-exit`` turns 1 into 0.
"""

from __future__ import annotations

from qcmon.audit._chronic import field_keys, linear_trend, match_fields, register_references
from qcmon.audit._discover import SessionEntry, discover_sessions, session_date
from qcmon.audit._measure import build_manifest, measure_session, reusable
from qcmon.audit._run import EXIT_FLAGGED, EXIT_OK, EXIT_USAGE, AuditOptions, Progress, run_audit
from qcmon.audit._write import AUDIT_COLUMNS, CHRONIC_COLUMNS
from qcmon.audit.cli import add_arguments, run

__all__ = [
    "AUDIT_COLUMNS", "CHRONIC_COLUMNS", "EXIT_FLAGGED", "EXIT_OK", "EXIT_USAGE", "AuditOptions", "Progress",
    "SessionEntry", "add_arguments", "build_manifest", "discover_sessions", "field_keys", "linear_trend",
    "match_fields", "measure_session", "register_references", "reusable", "run", "run_audit", "session_date",
]

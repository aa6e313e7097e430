"""Measuring one session of an audit (in a worker process or on a cluster) and knowing when a record is current.

Everything here is a top-level function over plain data (dicts of str, numbers and lists), so it runs the same in
this process, in a ``spawn`` process pool and on a dask worker.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import math
import shutil
import time
import traceback
import warnings
from pathlib import Path
from typing import TYPE_CHECKING

import qcmon

if TYPE_CHECKING:  # the report module loads only when a session is measured
    from qcmon.record.report import PlotWorkers

#: Version of the manifest layout; a different one means "measure again".
MANIFEST_SCHEMA = "qcmon.audit-manifest/1"

#: MonitorOptions fields an audit passes through (they change the numbers, so they belong to the manifest).
MONITOR_KEYS = ("frame_rate_hz", "pixel_size_um", "bit_depth", "dark_level", "z_step_um", "motion_channel",
                "channels", "planes", "raw_dtype", "raw_shape")


def profile_fingerprint(profile_name: str) -> dict:
    """Name, file and SHA-256 of the resolved content of a threshold profile (its limits after ``extends``).

    Raises :class:`qcmon.errors.ProfileError` for an unknown or invalid profile.
    """
    from qcmon.thresholds import load_profile

    prof = load_profile(profile_name)
    content = {
        "name": prof.name,
        "limits": {k: dataclasses.asdict(v) for k, v in sorted(prof.limits.items())},
        "extends": list(prof.extends),
    }
    digest = hashlib.sha256(json.dumps(content, sort_keys=True, default=str).encode()).hexdigest()
    return {"name": prof.name, "path": str(prof.path), "sha256": digest}


def file_list(paths) -> list[list]:
    """``[name, size_bytes, mtime_ns]`` of each file (``-1`` for a file that vanished)."""
    out = []
    for p in paths:
        p = Path(p)
        try:
            st = p.stat()
            out.append([p.name, int(st.st_size), int(st.st_mtime_ns)])
        except OSError:
            out.append([p.name, -1, -1])
    return out


def build_manifest(task: dict) -> dict:
    """What the record of ``task`` depends on: frame files (names, sizes, mtimes), z-stack, qcmon version,
    profile (name + content hash) and the acquisition options."""
    files = list(task["frame_files"]) + list(task.get("extra_files", ()))
    return {
        "schema": MANIFEST_SCHEMA,
        "qcmon_version": qcmon.__version__,
        "profile": task["profile_fingerprint"],
        "files": file_list(files),
        "zstack": file_list([task["zstack"]])[0] if task.get("zstack") else None,
        "options": {k: task["monitor"].get(k) for k in MONITOR_KEYS},
    }


def manifest_path(record_dir: str | Path) -> Path:
    """The manifest is kept beside the record: ``OUT/sessions/a/b.qcmon`` → ``OUT/sessions/a/b.qcmon.json``."""
    record_dir = Path(record_dir)
    return record_dir.with_name(record_dir.name + ".json")


def _plain(obj):
    return json.loads(json.dumps(obj, default=str))


def reusable(task: dict) -> dict | None:
    """The stored outcome of ``task`` when its record is current (same manifest, outputs present), else None.

    Only file metadata is looked at: no frame is read.
    """
    mpath = manifest_path(task["record"])
    try:
        stored = json.loads(mpath.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    if stored.get("manifest") != _plain(build_manifest(task)):
        return None
    outcome = stored.get("outcome") or {}
    if outcome.get("status") == "measured":
        record = Path(task["record"])
        if not (record / "summary.json").is_file() or not (record / "traces.csv").is_file():
            return None
        try:
            outcome["summary"] = json.loads((record / "summary.json").read_text(encoding="utf-8"))
        except (OSError, ValueError):
            return None
    outcome = dict(outcome)
    outcome["status"] = "reused" if outcome.get("status") == "measured" else outcome.get("status", "error")
    outcome["reused"] = True
    outcome["seconds"] = 0.0
    return outcome


def _error_text(err: BaseException) -> str:
    text = str(err).strip() or type(err).__name__
    if not isinstance(err, (ValueError, OSError)):
        text = f"{type(err).__name__}: {text}"
    return " ".join(text.split())


def measure_session(task: dict, plots: PlotWorkers | None = None) -> dict:
    """Measure one session through :class:`qcmon.monitor.loop.Monitor` (``follow=False``) into ``task["record"]``.

    Never raises for a bad session: the outcome carries the error. Writes the manifest beside the record.

    Parameters
    ----------
    task : dict
        ``rel``, ``path``, ``frame_files``, ``extra_files``, ``zstack``, ``record``, ``profile``,
        ``profile_fingerprint``, ``monitor`` (MonitorOptions keyword arguments of :data:`MONITOR_KEYS`).
    plots : qcmon.record.report.PlotWorkers, optional
        Processes that draw the report's plots (left open for the next session); default: drawn in this process.

    Returns
    -------
    dict
        ``rel``, ``status`` (``"measured"`` or ``"error"``), ``error``, ``summary`` (the content of
        ``summary.json``), ``record``, ``seconds`` (wall time), ``frames``, ``bytes``, ``warnings`` and
        ``problems`` (messages the engine reported while reading).
    """
    t0 = time.perf_counter()
    record = Path(task["record"])
    manifest = build_manifest(task)
    outcome: dict = {"rel": task["rel"], "status": "error", "error": "", "summary": None, "record": str(record),
                     "frames": 0, "bytes": sum(max(f[1], 0) for f in manifest["files"]), "warnings": [],
                     "problems": [], "reused": False}
    try:
        if not task["frame_files"]:
            raise ValueError(f"{task['path']}: empty folder, no frame files")
        from qcmon.monitor.loop import Monitor, MonitorOptions

        if record.exists():
            shutil.rmtree(record)  # our own stale record, never the microscope's files
        record.parent.mkdir(parents=True, exist_ok=True)
        kwargs = {k: v for k, v in task["monitor"].items() if v is not None}
        if kwargs.get("raw_shape") is not None:
            kwargs["raw_shape"] = tuple(kwargs["raw_shape"])
        opts = MonitorOptions(path=Path(task["path"]), out_dir=record, profile=task["profile"], follow=False,
                              resume=False, zstack=Path(task["zstack"]) if task.get("zstack") else None,
                              workers=int(task.get("split_workers", 1)), dataset=task.get("dataset"), **kwargs)
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            monitor = Monitor(opts, plots=plots)
            paths = monitor.run()
        outcome["warnings"] = sorted({f"{w.category.__name__}: {w.message}" for w in caught})
        outcome["problems"] = list(monitor.problems)
        summary = json.loads(Path(paths["summary"]).read_text(encoding="utf-8"))
        outcome["summary"] = summary
        outcome["frames"] = int(summary.get("frames") or 0)
        if outcome["frames"] == 0:
            first = "; ".join(monitor.problems[:3])
            raise ValueError(f"{task['path']}: no frame could be measured" + (f" ({first})" if first else ""))
        outcome["status"] = "measured"
    except Exception as err:  # a bad session is a row of the audit, never its end
        outcome["status"] = "error"
        outcome["error"] = _error_text(err)
        outcome["traceback"] = traceback.format_exc(limit=6)
    outcome["seconds"] = time.perf_counter() - t0
    # paths in messages relative to the archive, like every output (and valid when the archive moves)
    outcome["error"] = outcome["error"].replace(str(task["path"]), task["rel"])
    outcome["problems"] = [str(p).replace(str(task["path"]), task["rel"]) for p in outcome["problems"]]
    stored = {k: v for k, v in outcome.items() if k != "summary"}
    try:
        record.parent.mkdir(parents=True, exist_ok=True)
        from qcmon.record.journal import write_atomic

        write_atomic(manifest_path(record), json.dumps({"manifest": manifest, "outcome": stored}, indent=1,
                                                       default=str))
    except OSError as err:
        outcome["warnings"].append(f"manifest not written: {err}")
    return _plain_outcome(outcome)


def _plain_outcome(outcome: dict) -> dict:
    def fix(v):
        if isinstance(v, float) and not math.isfinite(v):
            return None
        if isinstance(v, dict):
            return {k: fix(x) for k, x in v.items()}
        if isinstance(v, (list, tuple)):
            return [fix(x) for x in v]
        return v
    return fix(outcome)

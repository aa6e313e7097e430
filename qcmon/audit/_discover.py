"""Finding the sessions of an archive, their frame files and their dates."""

from __future__ import annotations

import fnmatch
import os
import re
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path

#: File name endings of TIFF frames.
TIFF_SUFFIXES = (".tif", ".tiff")
#: File name endings of raw streams; they count as frames only with a sidecar ``.toml``.
RAW_SUFFIXES = (".raw", ".bin", ".dat")
#: Names of reference z-stacks: never frames, handed to the engine as the session's stack.
ZSTACK_PATTERN = "zstack*.tif*"

_DATE = re.compile(r"(?<!\d)(\d{4})-(\d{2})-(\d{2})(?:[T_ ](\d{2})[-:h](\d{2})(?:[-:m](\d{2}))?)?(?!\d)")


@dataclass(frozen=True)
class SessionEntry:
    """One session found under a root.

    Attributes
    ----------
    path : Path
        The session folder (absolute).
    rel : str
        Its path relative to its root, with ``/``; when several roots are given the root's own name comes first.
    frame_files : tuple of Path
        The frame files it holds directly (TIFF, or raw streams with their sidecars), sorted by name.
    zstack : Path or None
        A reference z-stack found in the folder or its parent (``zstack*.tif``).
    dataset : str or None
        For a session in a container file (``path`` is the file): its image series, when the file holds several.
    """

    path: Path
    rel: str
    frame_files: tuple[Path, ...] = ()
    zstack: Path | None = None
    extra_files: tuple[Path, ...] = field(default=())
    #: The image series to read when ``path`` is a container (HDF5, NWB, Zarr) holding several.
    dataset: str | None = None


def _is_zstack(name: str) -> bool:
    return fnmatch.fnmatch(name.lower(), ZSTACK_PATTERN)


def frame_files_in(folder: Path) -> tuple[list[Path], list[Path]]:
    """Frame files held directly by ``folder`` and the sidecars that go with them.

    Returns ``(frames, sidecars)``, both sorted by name.
    """
    try:
        names = sorted(os.listdir(folder))
    except OSError:
        return [], []
    files = {n for n in names if (folder / n).is_file()}
    frames: list[Path] = []
    sidecars: list[Path] = []
    for n in sorted(files):
        low = n.lower()
        if low.endswith(TIFF_SUFFIXES) and not _is_zstack(n) and not n.startswith("."):
            frames.append(folder / n)
        elif low.endswith(RAW_SUFFIXES):
            stem = n.rsplit(".", 1)[0]
            for side in (f"{n}.toml", f"{stem}.toml"):
                if side in files:
                    frames.append(folder / n)
                    sidecars.append(folder / side)
                    break
    return frames, sidecars


def container_sessions(folder: Path, names) -> list[tuple[Path, str | None, str | None]]:
    """The sessions held in container files among ``names`` (files and folders of ``folder``).

    Returns ``(path, dataset, error)`` for each image series: ``dataset`` None when the file holds one series,
    ``error`` the reason when the file cannot be opened (listed as a session that could not be read). An HDF5 file
    or Zarr store without an image series is not a session; nor is an NWB file without an imaging series.
    """
    from qcmon.errors import FrameError
    from qcmon.sources.arrays import container_kind, list_series

    out = []
    for n in sorted(names):
        if n.startswith("."):
            continue
        path = folder / n
        if container_kind(str(path)) is None:
            continue
        try:
            series = list_series(str(path))
        except FrameError as exc:
            out.append((path, None, exc.reason))
            continue
        except Exception as exc:  # noqa: BLE001 - a damaged container is a row of the audit, never its end
            out.append((path, None, f"cannot be read: {type(exc).__name__}: {exc}"))
            continue
        if len(series) == 1:
            out.append((path, None, None))
        else:
            out.extend((path, s.label, None) for s in series)
    return out


def is_record_folder(folder: Path) -> bool:
    """True for qcmon's own output: a ``*.qcmon`` folder, or one holding a ``summary.json`` written by qcmon."""
    if folder.name.endswith(".qcmon"):
        return True
    summary = folder / "summary.json"
    if summary.is_file():
        try:
            head = summary.read_text(encoding="utf-8", errors="replace")[:4096]
        except OSError:
            return False
        return '"qcmon.summary/' in head or '"qcmon_version"' in head
    return False


def _zstack_for(folder: Path, root: Path) -> Path | None:
    for where in (folder, folder.parent):
        try:
            cands = sorted(p for p in where.iterdir() if p.is_file() and _is_zstack(p.name))
        except OSError:
            cands = []
        if cands:
            return cands[0]
        if where == root:
            break
    return None


def discover_sessions(roots, *, skip: tuple[Path, ...] = (), zstacks: bool = True) -> list[SessionEntry]:
    """Every session under ``roots`` (see the rule in :mod:`qcmon.audit`), sorted by relative path.

    Parameters
    ----------
    roots : sequence of path-like
        Archive folders, or single session folders.
    skip : tuple of Path, optional
        Folders never entered (the audit's own output folder).
    zstacks : bool, optional
        Look for a reference z-stack beside each session.

    Raises
    ------
    ValueError
        A root that is not a folder (the message names it).
    """
    roots = [Path(r) for r in roots]
    if not roots:
        raise ValueError("roots: give at least one folder")
    for r in roots:
        if not r.is_dir():
            raise ValueError(f"{r}: not a folder")
    skip_resolved = {Path(s).resolve() for s in skip}
    names = [r.resolve().name or str(r) for r in roots]
    prefix = len(roots) > 1
    out: list[SessionEntry] = []
    for root, rname in zip(roots, names):
        root = root.resolve()
        for dirpath, dirnames, _files in os.walk(root):
            folder = Path(dirpath)
            keep = []
            for d in sorted(dirnames):
                sub = folder / d
                if d.startswith(".") or sub.resolve() in skip_resolved or is_record_folder(sub):
                    continue
                keep.append(d)
            dirnames[:] = [d for d in keep if not d.lower().endswith(".zarr")]  # a Zarr store is one container
            if folder.resolve() in skip_resolved or is_record_folder(folder):
                dirnames[:] = []
                continue
            for path, dataset, _error in container_sessions(folder, list(_files) + [d for d in keep
                                                                                  if d.lower().endswith(".zarr")]):
                rel = path.relative_to(root).as_posix() + (f"/{dataset.strip('/')}" if dataset else "")
                if prefix:
                    rel = f"{rname}/{rel}"
                out.append(SessionEntry(path=path, rel=rel, frame_files=(path,), dataset=dataset,
                                        zstack=_zstack_for(folder, root) if zstacks else None))
            frames, sidecars = frame_files_in(folder)
            empty_leaf = not frames and not keep and not os.listdir(folder)
            if not frames and not empty_leaf:
                continue
            rel = folder.relative_to(root).as_posix()
            if rel == ".":
                rel = rname
            elif prefix:
                rel = f"{rname}/{rel}"
            out.append(SessionEntry(path=folder, rel=rel, frame_files=tuple(frames),
                                    zstack=_zstack_for(folder, root) if zstacks and frames else None,
                                    extra_files=tuple(sidecars)))
    out.sort(key=lambda e: e.rel)
    seen: set[str] = set()
    for e in out:
        if e.rel in seen:
            raise ValueError(f"{e.path}: two sessions would share the relative path {e.rel!r}; audit the roots "
                             "one at a time or give roots with different names")
        seen.add(e.rel)
    return out


def session_date(rel: str, frame_files=()) -> tuple[datetime | None, str]:
    """When a session was acquired, and where that came from.

    The last ISO date in the relative path (``2026-11-03``, optionally followed by a time ``T14-05`` /
    ``_14-05-30``) wins; else the earliest modification time of its frame files (UTC).

    Returns
    -------
    (datetime or None, str)
        The date (naive = as written in the path) and its origin: ``"path"``, ``"mtime"`` or ``""``.
    """
    found = list(_DATE.finditer(rel))
    for m in reversed(found):
        y, mo, d, hh, mm, ss = m.groups()
        try:
            return datetime(int(y), int(mo), int(d), int(hh or 0), int(mm or 0), int(ss or 0)), "path"
        except ValueError:
            continue
    times = []
    for f in frame_files:
        try:
            times.append(Path(f).stat().st_mtime)
        except OSError:
            pass
    if times:
        return datetime.fromtimestamp(min(times), tz=timezone.utc).replace(tzinfo=None), "mtime"
    return None, ""

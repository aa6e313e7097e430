"""Frames from image series stored as N-D arrays: HDF5, NWB and Zarr / OME-Zarr.

Which files
-----------
- **HDF5** (``.h5``, ``.hdf5``, ``.hdf``, ``.he5``), read with h5py: a dataset of 3 to 5 axes (time, rows, columns
  and optionally channels and planes). ``dataset`` names it; without it, the file must hold exactly one such
  dataset. Axes come from the dimension labels (HDF5 dimension scales API) or an ``axes`` attribute (a string
  such as ``"tczyx"`` or a list of names), else 3 axes are (time, row, column) and 5 axes (time, channel, plane,
  row, column); 4 axes without names need the ``channels`` or ``planes`` option to say what the second axis is.
  Facts from attributes of the dataset, then of its groups up to the root: ``frame_rate_hz``, ``pixel_size_um``,
  ``z_step_um`` (our names, as in the raw sidecar) and ``element_size_um`` (µm per axis, a convention of image
  HDF5 files; from memory).
- **NWB** (``.nwb``, or an HDF5 file whose root says ``nwb_version``), read with h5py: each ``TwoPhotonSeries`` and
  ``OnePhotonSeries`` in ``/acquisition`` is a series (``dataset`` is its name). NWB core schema (from memory of
  the schema, checked by the tests against files written by the standard's own library where it is installed):
  ``data`` has axes (frame, x, y) or (frame, x, y, z) — x is the column, so a frame is ``data[t].T``; the rate is
  the ``rate`` attribute of ``starting_time``, or per-frame ``timestamps`` (s); the ``imaging_plane`` link leads to
  ``grid_spacing`` (attribute ``unit``, default metres), ``imaging_rate``, ``indicator``, ``location`` and
  ``excitation_lambda`` (nm); without ``grid_spacing`` the pixel size is ``field_of_view`` (m) ÷ the frame size.
  Stored values are measured as they are (``conversion`` and ``offset`` are not applied: the detector's numbers
  are what saturation and photon transfer need).
- **Zarr** (a ``.zarr`` folder, format 2 or 3), read with zarr: an array of 3 to 5 axes as for HDF5 (names from
  ``dimension_names`` or the ``_ARRAY_DIMENSIONS`` attribute); an **OME-Zarr** image (OME-NGFF ``multiscales``,
  versions 0.1-0.5) is read at its first, full-resolution level, axes and scales from its metadata.

Reading
-------
Each batch opens the file read-only (HDF5 without file locking, so a writer is never locked out) and closes it at
the end. Frames come in the session's order time -> plane -> channel; ``page`` is the frame's position in that
order within the file. Time points are read in blocks of the storage's chunks along time (at most 32 MiB), so a
chunk is decompressed once. An HDF5 file written in SWMR mode (single writer, multiple readers; superblock version
3) can be watched while it grows; any other HDF5 file, and Zarr, is for finished sessions.
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass, field

import numpy as np

from qcmon.errors import FrameError, NotReadyError

HDF5_SUFFIXES = (".h5", ".hdf5", ".hdf", ".he5")
NWB_SUFFIXES = (".nwb",)
ZARR_SUFFIXES = (".zarr",)
#: NWB neurodata types whose ``data`` are frames of a microscope.
NWB_SERIES_TYPES = ("TwoPhotonSeries", "OnePhotonSeries")
_HDF5_SIGNATURE = b"\x89HDF\r\n\x1a\n"
_BLOCK_BYTES = 32 << 20
#: Axis names -> our letters (t time, c channel, z plane, y row, x column).
_AXIS_NAMES = {
    "t": "t", "time": "t", "frame": "t", "frames": "t", "c": "c", "channel": "c", "channels": "c",
    "z": "z", "plane": "z", "planes": "z", "depth": "z", "y": "y", "row": "y", "rows": "y", "height": "y",
    "x": "x", "column": "x", "columns": "x", "col": "x", "width": "x",
}
#: OME-NGFF units (UDUNITS-2 names) in µm and s.
_NGFF_LENGTH_UM = {"angstrom": 1e-4, "nanometer": 1e-3, "micrometer": 1.0, "micron": 1.0, "millimeter": 1e3,
                   "centimeter": 1e4, "meter": 1e6}
_NGFF_TIME_S = {"nanosecond": 1e-9, "microsecond": 1e-6, "millisecond": 1e-3, "second": 1.0, "minute": 60.0,
                "hour": 3600.0}
_NWB_LENGTH_UM = {"meters": 1e6, "meter": 1e6, "m": 1e6, "millimeters": 1e3, "mm": 1e3, "micrometers": 1.0,
                  "micrometer": 1.0, "microns": 1.0, "um": 1.0, "µm": 1.0}


def container_kind(path: str) -> str | None:
    """``"hdf5"``, ``"nwb"`` or ``"zarr"`` for a container of image series (by its name; a folder holding Zarr
    metadata is Zarr too), None otherwise."""
    low = os.path.basename(os.path.normpath(path)).lower()
    if low.endswith(NWB_SUFFIXES):
        return "nwb"
    if low.endswith(HDF5_SUFFIXES):
        return "hdf5"
    if low.endswith(ZARR_SUFFIXES):
        return "zarr"
    if os.path.isdir(path) and any(os.path.exists(os.path.join(path, n)) for n in (".zarray", ".zgroup", "zarr.json")):
        return "zarr"
    return None


@dataclass
class Series:
    """One image series of a container: where its array is and how to read it."""

    label: str  # what ``dataset`` names (NWB: the series' name; HDF5: the dataset's path; Zarr: the array's path)
    array_path: str  # path of the array inside the container
    axes: str = ""  # one letter per axis of the array (t, c, z, y, x)
    facts: dict = field(default_factory=dict)  # key -> (value, origin)
    timestamps: np.ndarray | None = None  # seconds per time point (NWB ``timestamps``)
    notes: list[str] = field(default_factory=list)
    error: str | None = None  # why the series cannot be read


@dataclass
class ArrayMetadata:
    """What a container says about its series (the interface of :class:`qcmon.sources.metadata.FileMetadata`)."""

    facts: dict = field(default_factory=dict)
    plane_fastest: bool = False  # frames come time -> plane -> channel
    notes: list[str] = field(default_factory=list)
    timestamps: np.ndarray | None = None
    per_point: int = 1  # frames per time point

    def timestamp(self, page: int) -> float:
        """Seconds of the frame at ``page`` from the series' own clock, NaN when it has none."""
        if self.timestamps is None:
            return math.nan
        t = page // self.per_point
        return float(self.timestamps[t]) if t < len(self.timestamps) else math.nan


# ------------------------------------------------------------------------------------------------ opening
def _text(value) -> str:
    if isinstance(value, bytes):
        return value.decode("utf-8", "replace")
    if isinstance(value, np.ndarray) and value.shape == ():
        return _text(value.item())
    return str(value)


def hdf5_superblock_version(path: str) -> int | None:
    """Version of the HDF5 superblock (3 = written for SWMR), None when the file does not start like HDF5.

    HDF5 File Format Specification, section II.A: the 8-byte signature at byte 0 (or 512, 1024, ...), then the
    superblock version byte.
    """
    try:
        with open(path, "rb") as fh:
            for at in (0, 512, 1024, 2048, 4096):
                fh.seek(at)
                head = fh.read(9)
                if head[:8] == _HDF5_SIGNATURE and len(head) == 9:
                    return head[8]
    except OSError:
        return None
    return None


def open_hdf5(path: str):
    """An h5py File, read-only, without file locking (the writer is never locked out), in SWMR read mode when the
    file allows it. FrameError naming the file when it is not HDF5 or is damaged."""
    import h5py

    version = hdf5_superblock_version(path)
    if version is None:
        raise FrameError("not an HDF5 file (no HDF5 signature at its start)", path=path)
    try:
        return h5py.File(path, "r", locking=False, swmr=version >= 3)
    except OSError as exc:
        text = str(exc)
        if "truncated" in text:
            raise FrameError(f"HDF5 file is truncated or still being written ({_h5_reason(text)})", path=path) from None
        raise FrameError(f"HDF5 file cannot be opened: {_h5_reason(text)}", path=path) from None


def _h5_reason(text: str) -> str:
    return text.replace("Unable to synchronously open file ", "").replace("Unable to open file ", "").strip("() ")


def open_zarr(path: str):
    """The root node of a Zarr store, read-only. FrameError naming the store when it is not Zarr."""
    try:
        import zarr
    except ImportError:
        raise FrameError("reading Zarr needs the zarr package (3.0 or later, which needs Python 3.11 or later)",
                         path=path) from None
    if int(zarr.__version__.split(".")[0]) < 3:
        raise FrameError(f"reading Zarr needs zarr 3.0 or later (installed: {zarr.__version__})", path=path)

    try:
        return zarr.open(store=path, mode="r")
    except Exception as exc:  # noqa: BLE001 - zarr raises several types for a store it cannot read
        raise FrameError(f"not a Zarr store, or a damaged one: {type(exc).__name__}: {exc}", path=path) from None


def _letters(names, path: str, label: str) -> str:
    out = ""
    for name in names:
        letter = _AXIS_NAMES.get(str(name).strip().lower())
        if letter is None or letter in out:
            raise FrameError(f"dataset {label}: axis names {list(names)} are not time, channel, plane, row and "
                             "column (t, c, z, y, x), each once", path=path)
        out += letter
    return out


def _default_axes(shape, channels: int | None, planes: int | None, path: str, label: str) -> str:
    n = len(shape)
    if n == 3:
        return "tyx"
    if n == 5:
        return "tczyx"
    if n == 4:
        if channels is not None and shape[1] == channels and not (planes is not None and shape[1] == planes):
            return "tcyx"
        if planes is not None and shape[1] == planes:
            return "tzyx"
        raise FrameError(f"dataset {label} has 4 axes {tuple(shape)} without names: say what its second axis is "
                         "with --channels N or --planes N, or name its axes (dimension labels or an 'axes' "
                         "attribute such as 'tcyx')", path=path)
    raise FrameError(f"dataset {label} has {n} axes {tuple(shape)}; 3 to 5 expected (time, [channel], [plane], "
                     "row, column)", path=path)


def check_array(shape, dtype, axes: str, path: str, label: str) -> None:
    """FrameError naming file and dataset when an array cannot be read as frames."""
    if dtype.kind not in "ui" or dtype.itemsize > 4:
        raise FrameError(f"dataset {label} holds {dtype} values; integers of 8 to 32 bits (the detector's "
                         "numbers) expected", path=path)
    if len(axes) != len(shape):
        raise FrameError(f"dataset {label} has {len(shape)} axes {tuple(shape)} but {len(axes)} axis names "
                         f"({axes!r})", path=path)
    for need, what in (("t", "time"), ("y", "row"), ("x", "column")):
        if need not in axes:
            raise FrameError(f"dataset {label} has no {what} axis (axes {axes!r}); a series of frames over time "
                             "expected", path=path)


# ------------------------------------------------------------------------------------------------ HDF5 / NWB
def _attr_number(node, names) -> tuple[np.ndarray | None, str | None]:
    for name in names:
        if name in node.attrs:
            value = np.asarray(node.attrs[name])
            if value.dtype.kind in "uif" and value.size >= 1:
                return value, name
    return None, None


def _hdf5_facts(ds, axes: str) -> dict:
    facts: dict = {}
    node = ds
    while True:
        where = f"HDF5 attribute {node.name}"
        for key, names in (("frame_rate_hz", ("frame_rate_hz",)), ("pixel_size_um", ("pixel_size_um",)),
                           ("z_step_um", ("z_step_um",))):
            value, name = _attr_number(node, names)
            if value is not None and key not in facts:
                v = float(value.ravel()[0])
                if v > 0 and math.isfinite(v):
                    facts[key] = (v, f"{where}@{name}")
        value, name = _attr_number(node, ("element_size_um",))
        if value is not None and value.size == len(axes):
            sizes = dict(zip(axes, value.ravel().tolist()))
            for letter, key in (("x", "pixel_size_um"), ("y", "pixel_size_y_um"), ("z", "z_step_um")):
                v = sizes.get(letter)
                if v is not None and v > 0 and key not in facts:
                    facts[key] = (float(v), f"{where}@{name}")
        if node.name == "/":
            break
        node = node.parent
    return facts


def _hdf5_axes(ds, channels, planes, path, label) -> str:
    labels = [d.label for d in ds.dims]
    if all(labels):
        return _letters(labels, path, label)
    if "axes" in ds.attrs:
        raw = ds.attrs["axes"]
        names = list(_text(raw)) if isinstance(raw, (str, bytes)) or np.ndim(raw) == 0 else [_text(v) for v in raw]
        return _letters(names, path, label)
    return _default_axes(ds.shape, channels, planes, path, label)


def hdf5_series(f, path: str, *, channels=None, planes=None) -> list[Series]:
    """Every dataset of 3 to 5 axes in an open HDF5 file (an NWB file: its image series)."""
    if "nwb_version" in f.attrs or path.lower().endswith(NWB_SUFFIXES):
        return nwb_series(f, path)
    found: list[str] = []

    def visit(name, obj):
        if hasattr(obj, "shape") and hasattr(obj, "dtype") and 3 <= len(obj.shape) <= 5:
            found.append(name)

    f.visititems(visit)
    return [hdf5_dataset_series(f, name, path, channels=channels, planes=planes) for name in sorted(found)]


def hdf5_dataset_series(f, name: str, path: str, *, channels=None, planes=None) -> Series:
    label = name.strip("/")
    series = Series(label=label, array_path=name)
    try:
        ds = f[name]
        if not hasattr(ds, "shape"):
            raise FrameError(f"{label} is a group, not a dataset", path=path)
        series.axes = _hdf5_axes(ds, channels, planes, path, label)
        check_array(ds.shape, ds.dtype, series.axes, path, label)
        series.facts = _hdf5_facts(ds, series.axes)
    except FrameError as exc:
        series.error = exc.reason
    return series


def nwb_series(f, path: str) -> list[Series]:
    """The two-photon and one-photon series in ``/acquisition`` of an open NWB file."""
    out = []
    acq = f.get("acquisition")
    if acq is None:
        return out
    for name in sorted(acq):
        group = acq.get(name)
        kind = _text(group.attrs.get("neurodata_type", "")) if group is not None else ""
        if kind in NWB_SERIES_TYPES:
            out.append(_nwb_one(f, group, name, kind, path))
    return out


def _nwb_one(f, group, name: str, kind: str, path: str) -> Series:
    series = Series(label=name, array_path=f"{group.name}/data")
    facts = series.facts
    where = f"NWB {kind} {name}"
    try:
        if "external_file" in group:
            files = [_text(v) for v in np.asarray(group["external_file"]).ravel()[:3]]
            raise FrameError(f"series {name}: its frames are in external files ({', '.join(files)}); read those "
                             "files instead", path=path)
        if "data" not in group:
            raise FrameError(f"series {name} has no data", path=path)
        ds = group["data"]
        n = len(ds.shape)
        if n not in (3, 4):
            raise FrameError(f"series {name}: data has {n} axes {ds.shape}; (frame, x, y) or (frame, x, y, z) "
                             "expected", path=path)
        series.axes = "txy" if n == 3 else "txyz"
        check_array(ds.shape, ds.dtype, series.axes, path, name)
        if "starting_time" in group:
            rate = group["starting_time"].attrs.get("rate")
            if rate is not None and float(rate) > 0:
                facts["frame_rate_hz"] = (float(rate), f"{where} starting_time@rate")
        if "timestamps" in group:
            stamps = np.asarray(group["timestamps"][()], dtype=np.float64).ravel()
            if len(stamps) >= 1:
                series.timestamps = stamps
                if len(stamps) >= 2 and "frame_rate_hz" not in facts:
                    step = float(np.median(np.diff(stamps)))
                    if step > 0:
                        facts["frame_rate_hz"] = (1.0 / step, f"{where} timestamps (median interval)")
        plane = group.get("imaging_plane")
        if plane is not None:
            link = group.get("imaging_plane", getlink=True)
            target = getattr(link, "path", None) or plane.name  # a soft link to /general/optophysiology/NAME
            facts["imaging_plane"] = (target.rsplit("/", 1)[-1], where)
            for key, what in (("indicator", "indicator"), ("location", "location")):
                if key in plane:
                    facts[what] = (_text(plane[key][()]), f"NWB imaging plane {target}")
            if "excitation_lambda" in plane:
                facts["excitation_nm"] = (float(plane["excitation_lambda"][()]), f"NWB imaging plane {target}")
            if "frame_rate_hz" not in facts and "imaging_rate" in plane:
                rate = float(plane["imaging_rate"][()])
                if rate > 0 and math.isfinite(rate):
                    facts["frame_rate_hz"] = (rate, f"NWB imaging plane {target} imaging_rate")
            if "grid_spacing" in plane:
                gs = plane["grid_spacing"]
                unit = _text(gs.attrs.get("unit", "meters")).strip().lower()
                scale = _NWB_LENGTH_UM.get(unit)
                values = np.asarray(gs[()], dtype=np.float64).ravel()
                if scale is None:
                    series.notes.append(f"{name}: grid_spacing unit {unit!r} is not a length; pixel size not used")
                elif len(values) >= 2 and values[0] > 0 and values[1] > 0:
                    origin = f"NWB imaging plane {target} grid_spacing"
                    facts["pixel_size_um"] = (float(values[0]) * scale, origin)
                    facts["pixel_size_y_um"] = (float(values[1]) * scale, origin)
                    if len(values) >= 3 and values[2] > 0:
                        facts["z_step_um"] = (float(values[2]) * scale, origin)
        if "pixel_size_um" not in facts and "field_of_view" in group:
            fov = np.asarray(group["field_of_view"][()], dtype=np.float64).ravel()
            if len(fov) >= 2 and fov[0] > 0:
                # field_of_view is (width, height[, depth]) in metres; data axes are (frame, x, y)
                facts["pixel_size_um"] = (float(fov[0]) * 1e6 / ds.shape[1], f"{where} field_of_view")
                facts["pixel_size_y_um"] = (float(fov[1]) * 1e6 / ds.shape[2], f"{where} field_of_view")
        facts["series"] = (name, where)
    except FrameError as exc:
        series.error = exc.reason
    return series


# ------------------------------------------------------------------------------------------------ Zarr
def _ngff_multiscales(attrs) -> list | None:
    attrs = dict(attrs)
    if isinstance(attrs.get("ome"), dict) and "multiscales" in attrs["ome"]:
        return attrs["ome"]["multiscales"]  # OME-NGFF 0.5 (Zarr format 3)
    return attrs.get("multiscales")  # OME-NGFF 0.1-0.4


def _array_names(arr) -> list | None:
    names = getattr(getattr(arr, "metadata", None), "dimension_names", None)
    if names and all(names):
        return list(names)
    dims = dict(arr.attrs).get("_ARRAY_DIMENSIONS")
    if dims and all(dims):
        return list(dims)
    axes = dict(arr.attrs).get("axes")
    if isinstance(axes, str):
        return list(axes)
    if isinstance(axes, list) and all(isinstance(a, str) for a in axes):
        return axes
    return None


def zarr_series(root, path: str, *, channels=None, planes=None) -> list[Series]:
    """The image series of a Zarr store: OME-Zarr images (full resolution) and other arrays of 3 to 5 axes."""
    import zarr

    if isinstance(root, zarr.Array):
        return [_zarr_array_series(root, "", path, channels, planes)]
    out: list[Series] = []
    groups = [("", root)] + [(name, node) for name, node in root.members(max_depth=None)
                             if isinstance(node, zarr.Group)]
    inside: set[str] = set()
    for name, group in groups:
        ms = _ngff_multiscales(group.attrs)
        if ms:
            out.append(_ngff_series(group, name, ms, path))
            inside.add(name)
    for name, node in root.members(max_depth=None):
        if not isinstance(node, zarr.Array) or len(node.shape) < 3 or len(node.shape) > 5:
            continue
        parent = name.rsplit("/", 1)[0] if "/" in name else ""
        if parent in inside or "" in inside:
            continue  # a level of an OME-Zarr image
        out.append(_zarr_array_series(node, name, path, channels, planes))
    return sorted(out, key=lambda s: s.label)


def _zarr_array_series(arr, name: str, path: str, channels, planes) -> Series:
    label = name or "(root array)"
    series = Series(label=name, array_path=name)
    try:
        names = _array_names(arr)
        series.axes = (_letters(names, path, label) if names else
                       _default_axes(arr.shape, channels, planes, path, label))
        check_array(arr.shape, arr.dtype, series.axes, path, label)
        attrs = dict(arr.attrs)
        for key in ("frame_rate_hz", "pixel_size_um", "z_step_um"):
            v = attrs.get(key)
            if isinstance(v, (int, float)) and not isinstance(v, bool) and v > 0:
                series.facts[key] = (float(v), f"Zarr attribute {label}@{key}")
    except FrameError as exc:
        series.error = exc.reason
    return series


def _ngff_series(group, name: str, multiscales: list, path: str) -> Series:
    label = name or "(root image)"
    series = Series(label=name, array_path="")
    try:
        ms = multiscales[0]
        datasets = ms.get("datasets") or []
        if not datasets or "path" not in datasets[0]:
            raise FrameError(f"OME-Zarr image {label}: multiscales lists no datasets", path=path)
        level = datasets[0]["path"]
        series.array_path = f"{name}/{level}" if name else level
        axes = ms.get("axes")
        if axes is None:  # OME-NGFF 0.1-0.2: always 5-D t, c, z, y, x
            axes = ["t", "c", "z", "y", "x"]
        names = [a["name"] if isinstance(a, dict) else a for a in axes]
        series.axes = _letters(names, path, label)
        arr = group[level]
        check_array(arr.shape, arr.dtype, series.axes, path, label)
        units = {(_AXIS_NAMES.get(str(a.get("name", "")).lower())): a.get("unit") for a in axes if isinstance(a, dict)}
        scale = None
        for tr in (ms.get("coordinateTransformations") or []) + (datasets[0].get("coordinateTransformations") or []):
            if tr.get("type") == "scale" and "scale" in tr:
                s = np.asarray(tr["scale"], dtype=np.float64)
                scale = s if scale is None else scale * s
        if scale is not None and len(scale) == len(series.axes):
            origin = f"OME-Zarr {label} scale"
            for letter, key, table in (("x", "pixel_size_um", _NGFF_LENGTH_UM), ("y", "pixel_size_y_um", _NGFF_LENGTH_UM),
                                       ("z", "z_step_um", _NGFF_LENGTH_UM)):
                if letter in series.axes:
                    unit = units.get(letter)
                    factor = table.get(unit) if unit else None
                    v = scale[series.axes.index(letter)]
                    if factor is not None and v > 0:
                        series.facts[key] = (float(v) * factor, origin)
                    elif unit and factor is None:
                        series.notes.append(f"{label}: unit {unit!r} of axis {letter} is not a known length")
            unit = units.get("t")
            factor = _NGFF_TIME_S.get(unit) if unit else None
            v = scale[series.axes.index("t")]
            if factor is not None and v > 0 and not (len(datasets) and v == 1.0 and unit is None):
                series.facts["frame_rate_hz"] = (1.0 / (float(v) * factor), origin)
    except FrameError as exc:
        series.error = exc.reason
    except (KeyError, TypeError, ValueError, IndexError) as exc:
        series.error = f"OME-Zarr image {label}: metadata cannot be read ({type(exc).__name__}: {exc})"
    return series


# ------------------------------------------------------------------------------------------------ listing
def list_series(path: str, *, channels=None, planes=None) -> list[Series]:
    """The image series of a container (each may carry an ``error``). FrameError when the file cannot be read."""
    kind = container_kind(path)
    if kind == "zarr":
        return zarr_series(open_zarr(path), path, channels=channels, planes=planes)
    if kind in ("hdf5", "nwb"):
        with open_hdf5(path) as f:
            return hdf5_series(f, path, channels=channels, planes=planes)
    raise FrameError("not an HDF5, NWB or Zarr file", path=path)


def choose_series(path: str, dataset: str | None, *, channels=None, planes=None) -> Series:
    """The series named ``dataset`` (a series label or an array path), or the only one. FrameError otherwise."""
    candidates = list_series(path, channels=channels, planes=planes)
    if dataset is not None:
        wanted = dataset.strip("/")
        for s in candidates:
            if wanted in (s.label.strip("/"), s.array_path.strip("/")):
                break
        else:
            kind = container_kind(path)
            if kind in ("hdf5", "nwb") and not candidates or kind == "hdf5":
                with open_hdf5(path) as f:  # a dataset the listing passed over: say what is wrong with it
                    if wanted in f:
                        s = hdf5_dataset_series(f, wanted, path, channels=channels, planes=planes)
                        if s.error is None:
                            s.error = f"dataset {wanted} is not an image series"
                        raise FrameError(s.error, path=path)
            names = ", ".join(repr(c.label) for c in candidates) or "none"
            raise FrameError(f"no image series {dataset!r} (series found: {names})", path=path)
    elif len(candidates) == 1:
        s = candidates[0]
    elif not candidates:
        raise FrameError("holds no image series (a dataset of 3 to 5 axes: time, [channel], [plane], row, column; "
                         "NWB: a TwoPhotonSeries or OnePhotonSeries in /acquisition)", path=path)
    else:
        names = ", ".join(repr(c.label) for c in candidates)
        raise FrameError(f"holds {len(candidates)} image series ({names}); choose one with --dataset", path=path)
    if s.error is not None:
        raise FrameError(s.error, path=path)
    return s


# ------------------------------------------------------------------------------------------------ the stream
class ArrayStream:
    """The reading state of one image series in a container; same contract as
    :class:`qcmon.sources.tiffpages.TiffStream` (``iter_read``, ``pages_done``, ``skip``, ``skip_frames``,
    ``signature``, ``meta``).

    Parameters
    ----------
    path : str
        The container (HDF5/NWB file or Zarr folder).
    dataset : str, optional
        The series to read (see :func:`choose_series`).
    channels, planes : int, optional
        What the second axis of an unnamed 4-axis dataset is.
    """

    kind = "array"

    def __init__(self, path: str, *, dataset: str | None = None, channels: int | None = None,
                 planes: int | None = None):
        self.path = path
        self.container = container_kind(path)
        self.dataset = dataset
        self.pages_done = 0
        self.skip = 0
        self.skip_frames = 0
        self.signature: tuple[int, int] | None = None
        self.meta: ArrayMetadata | None = None
        self.series: Series | None = None
        self._options = (channels, planes)
        self._layout: tuple[int, int] | None = None  # (channels, planes)
        self._frame: tuple[str, tuple[int, int]] = ("", (0, 0))  # (dtype, (rows, columns)) of a frame
        self._total = 0  # frames in the array when this batch opened it
        self.swmr = False

    # the session asks for this when the stream is first opened (see SessionSource._opened)
    def file_metadata(self) -> ArrayMetadata:
        s = self.series
        meta = ArrayMetadata(facts=dict(s.facts), notes=list(s.notes), timestamps=s.timestamps)
        c, z = self._layout
        meta.per_point = c * z
        meta.facts.setdefault("channels", (c, self._origin()))
        meta.facts.setdefault("planes", (z, self._origin()))
        meta.facts.setdefault("dtype", (self._frame[0], self._origin()))
        meta.facts.setdefault("shape", (self._frame[1], self._origin()))
        return meta

    def _origin(self) -> str:
        label = self.series.label or "(root)"
        return {"nwb": "NWB", "zarr": "Zarr", "hdf5": "HDF5"}[self.container] + f" dataset {label}"

    def _open(self):
        """(handle to close or None, array) of the series, opened read-only for this batch."""
        if self.container == "zarr":
            root = open_zarr(self.path)
            if self.series is None:
                self.series = choose_series(self.path, self.dataset, channels=self._options[0],
                                            planes=self._options[1])
            arr = root if not self.series.array_path else root[self.series.array_path]
            return None, arr
        if self.series is None:
            self.series = choose_series(self.path, self.dataset, channels=self._options[0], planes=self._options[1])
        f = open_hdf5(self.path)
        self.swmr = bool(getattr(f, "swmr_mode", False))
        try:
            return f, f[self.series.array_path]
        except Exception:
            f.close()
            raise

    def iter_read(self, limit: int, *, give_up: bool = False, on_open=None):
        """Up to ``limit`` new frames as ``(page, data)``; returns why it stopped (see ``TiffStream.iter_read``)."""
        try:
            st = os.stat(self.path)
            handle, arr = self._open()
        except FrameError as exc:
            if not give_up and "truncated" in exc.reason:
                return NotReadyError(exc.reason)
            return exc
        except OSError as exc:
            return NotReadyError(f"cannot be opened: {exc}")
        try:
            result = yield from self._frames(arr, limit, give_up, on_open)
        finally:
            if handle is not None:
                handle.close()
        at_end = result is None and self._total <= self.pages_done  # (the array is closed now: not asked again)
        self.signature = (st.st_size, st.st_mtime_ns) if at_end else None
        return result

    def _available(self, arr) -> int:
        c, z = self._layout
        return int(arr.shape[self.series.axes.index("t")]) * c * z

    def _frames(self, arr, limit, give_up, on_open):
        axes = self.series.axes
        shape = arr.shape
        if self._layout is None:
            self._layout = (shape[axes.index("c")] if "c" in axes else 1, shape[axes.index("z")] if "z" in axes else 1)
            self._frame = (str(arr.dtype), (int(shape[axes.index("y")]), int(shape[axes.index("x")])))
            if self.meta is None and on_open is not None:
                on_open(self, None)
        n_c, n_z = self._layout
        per_point = n_c * n_z
        total = self._total = self._available(arr)
        self.pages_done += self.skip
        self.skip = 0
        passed = min(self.skip_frames, max(total - self.pages_done, 0))
        self.pages_done += passed
        self.skip_frames -= passed
        t_axis = axes.index("t")
        chunks = getattr(arr, "chunks", None)
        frame_bytes = arr.dtype.itemsize * int(np.prod([n for a, n in zip(axes, shape) if a != "t"]))
        block = int(chunks[t_axis]) if chunks else 1
        block = max(1, min(block, _BLOCK_BYTES // max(frame_bytes, 1)))
        # order of the remaining axes in a read block, and how to take one (row, column) frame from it
        rest = [a for a in axes if a != "t"]
        given = 0
        while given < limit and self.pages_done < total:
            t0 = self.pages_done // per_point
            t1 = min(t0 + block, total // per_point)
            sel = [slice(None)] * len(axes)
            sel[t_axis] = slice(t0, t1)
            try:
                data = np.asarray(arr[tuple(sel)])
            except Exception as exc:  # noqa: BLE001 - each storage and codec raises its own error types
                if not give_up:
                    return NotReadyError(f"time points {t0}-{t1 - 1} cannot be read yet: {exc}")
                reason = (f"dataset {self.series.label}: time points {t0} to {t1 - 1} cannot be read "
                          f"({type(exc).__name__}: {exc}); skipped")
                while self.pages_done < t1 * per_point:  # one item per frame: each holds its channel/plane slot
                    page = self.pages_done
                    self.pages_done += 1
                    given += 1
                    yield page, FrameError(reason, path=self.path, page=page)
                continue
            data = np.moveaxis(data, t_axis, 0)  # (t, rest...)
            order = ["t"] + rest
            want = ["t"] + [a for a in "cz" if a in order] + ["y", "x"]
            data = np.transpose(data, [order.index(a) for a in want])
            data = data.reshape((data.shape[0], -1) + data.shape[-2:])  # (t, z*c?, y, x)
            # the middle axis runs channel-major when both exist ("c" before "z"): frame k of a point is
            # (z, c) in time -> plane -> channel order
            has_c, has_z = "c" in want, "z" in want
            while given < limit and self.pages_done < t1 * per_point:
                page = self.pages_done
                t, k = divmod(page, per_point)
                z, c = divmod(k, n_c)
                j = (c * n_z + z) if (has_c and has_z) else k
                frame = np.ascontiguousarray(data[t - t0, j])
                self.pages_done += 1
                given += 1
                yield page, frame
        return None

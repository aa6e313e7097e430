import math

import numpy as np

from qcmon.columns import NAMES
from qcmon.errors import FrameError
from qcmon.events import Event
from qcmon.frames import AcquisitionFacts


def test_frame_error_names_file_and_page():
    err = FrameError("not a TIFF", path="/data/run_1.tif", page=3)
    assert str(err) == "/data/run_1.tif, page 3: not a TIFF"
    assert isinstance(err, ValueError)


def test_event_roundtrip_keeps_nan():
    ev = Event(kind="start", metric="z_um", state="warning", value=3.2, limit=3.0, frame=10, time_s=0.33)
    back = Event.from_json(ev.to_json())
    assert back.value == 3.2 and math.isnan(back.started_time_s)


def test_facts_first_origin_wins_unless_overridden():
    f = AcquisitionFacts()
    f.set("pixel_size_um", 0.8, "OME-TIFF")
    f.set("pixel_size_um", 1.0, "option")
    assert f.get("pixel_size_um") == 0.8
    f.set("pixel_size_um", np.float64(1.0), "option", override=True)
    assert f.as_dict()["pixel_size_um"] == {"value": 1.0, "origin": "option"}


def test_traces_columns_required_by_the_issue_are_present():
    for name in ("frame", "time_s", "dx_px", "dy_px", "displacement_um", "z_um", "focus_corr", "mean_f",
                 "saturated_frac", "snr", "channel", "plane"):
        assert name in NAMES


def test_readme_documents_every_trace_column_and_the_two_commands():
    """The README is the user's manual: every column of traces.csv must be in it, and the quick start."""
    from pathlib import Path

    readme = (Path(__file__).parents[1] / "README.md").read_text(encoding="utf-8")
    missing = [name for name in NAMES if f"`{name}`" not in readme]
    assert missing == []
    assert "make demo" in readme and "make test" in readme


def test_readme_column_table_matches_columns_py():
    """Each README table row carries the unit and meaning of qcmon/columns.py (the single source of truth), so a
    change of meaning (e.g. a value now sampled) cannot reach traces.csv without reaching the manual."""
    from pathlib import Path

    from qcmon.columns import COLUMNS

    readme = (Path(__file__).parents[1] / "README.md").read_text(encoding="utf-8")
    stale = [c.name for c in COLUMNS if f"| `{c.name}` | {c.unit or '–'} | {c.description} |" not in readme]
    assert stale == []

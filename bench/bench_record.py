"""Cost of the session record, the summary and the report, against plain references in the same run.

Run: ``python bench/bench_record.py [--rows N]``. Prints seconds for: appending N rows with
:class:`qcmon.record.journal.SessionRecord` vs. the standard library's ``csv.writer`` with ``str`` formatting (no fsync);
reading them back with :func:`qcmon.record.journal.read_traces` vs. ``numpy.genfromtxt``; the tracker per row; the summary;
and ``report.html`` vs. one matplotlib PNG of every raw point of a single trace. No assertions.
"""

from __future__ import annotations

import argparse
import csv
import io
import math
import tempfile
import time
from pathlib import Path

import numpy as np
from matplotlib.figure import Figure

from qcmon.columns import NAMES
from qcmon.record.journal import SessionRecord, read_traces
from qcmon.record.report import write_report
from qcmon.record.summary import summarize_traces
from qcmon.thresholds import ThresholdTracker, load_profile


def make_rows(n: int) -> list[dict]:
    rng = np.random.default_rng(1)
    d = np.abs(rng.normal(0.5, 0.2, n))
    d[n // 3: n // 3 + 300] += 7.0
    rows = []
    for i in range(n):
        t = i / 30.0
        b = 400.0 * math.exp(-t / 6000.0)
        rows.append({"frame": i, "channel": 0, "plane": 0, "time_s": t, "dx_px": float(d[i]), "dy_px": 0.0,
                     "displacement_px": float(d[i]), "displacement_um": float(d[i]) * 0.8, "reg_corr": 0.9,
                     "z_um": math.nan, "focus_corr": 0.97, "mean_f": b, "baseline_f": b,
                     "brightness_pct": b / 4.0, "bleach_pct_per_min": -1.0, "saturated_frac": 1e-4,
                     "clipped_frac": 0.0, "noise_sigma": 20.0, "snr": b / 20.0, "line_offset_px": 0.1,
                     "source": "run_0001.tif", "page": i})
    return rows


def timed(fn):
    t0 = time.perf_counter()
    out = fn()
    return time.perf_counter() - t0, out


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--rows", type=int, default=100_000)
    n = ap.parse_args().rows
    rows = make_rows(n)
    prof = load_profile("default")
    with tempfile.TemporaryDirectory() as tmp:
        out = Path(tmp)

        def ours_write():
            with SessionRecord(out / "rec") as rec:
                for k in range(0, n, 30):  # one second of frames per call, as the live monitor does
                    rec.append_rows(rows[k:k + 30])

        def ref_write():
            with open(out / "ref.csv", "w", newline="") as fh:
                w = csv.writer(fh)
                w.writerow(NAMES)
                for r in rows:
                    w.writerow([str(r.get(k, "")) for k in NAMES])

        t_w, _ = timed(ours_write)
        t_wr, _ = timed(ref_write)
        t_r, traces = timed(lambda: read_traces(out / "rec"))
        t_rr, _ = timed(lambda: np.genfromtxt(out / "rec" / "traces.csv", delimiter=",", names=True,
                                              dtype=None, encoding="utf-8"))
        tracker = ThresholdTracker(prof)
        t_t, events = timed(lambda: [ev for r in rows for ev in tracker.update(r)])
        t_s, summary = timed(lambda: summarize_traces(traces, events, facts={}, profile=prof))
        t_h, _ = timed(lambda: write_report(out, summary, traces, events, prof, {}))

        def ref_plot():
            fig = Figure(figsize=(9.5, 2.3))
            fig.add_subplot().plot(traces["time_s"], traces["displacement_px"], linewidth=0.8)
            fig.savefig(io.BytesIO(), format="png", dpi=90)

        t_hr, _ = timed(ref_plot)
    print(f"{n} rows")
    print(f"append   qcmon {t_w:7.2f} s   csv.writer+str {t_wr:7.2f} s   ratio {t_w / t_wr:5.2f}")
    print(f"read     qcmon {t_r:7.2f} s   numpy.genfromtxt {t_rr:7.2f} s   ratio {t_r / t_rr:5.2f}")
    print(f"tracker  {1e6 * t_t / n:7.1f} µs/row ({len(events)} events)")
    print(f"summary  {t_s:7.2f} s")
    print(f"report   qcmon (10 panels, envelopes) {t_h:7.2f} s   one raw-point panel {t_hr:7.2f} s   "
          f"ratio {t_h / t_hr:5.2f}")


if __name__ == "__main__":
    main()

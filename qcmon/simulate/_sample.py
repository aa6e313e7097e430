"""Regenerate the bundled example session ``sample_frames/``: ``python -m qcmon.simulate._sample [OUT]``.

96 × 96 px, 240 frames (8 s) at 30 Hz, one multipage OME-TIFF (zlib-compressed with a horizontal predictor to
stay under 2 MiB), a reference z-stack (±10 planes, 1 µm step), ``truth.csv`` and ``scenario.json``.
The "drift" scenario plants a focal drift of +6 µm/min (0.8 µm over the 8 s) and a +2 µm focal step at
60 % of the session (4.8 s). A low conversion gain (2 DN/photon) keeps the files compressible.
"""

from __future__ import annotations

import shutil
import sys
from pathlib import Path

from qcmon.simulate._write import write_session
from qcmon.simulate.scenarios import scenario_config

SAMPLE_CONFIG = dict(n_frames=240, height=96, width=96, frame_rate_hz=30.0, seed=7,
                     z_drift_um_per_min=6.0, gain_dn_per_photon=2.0, read_noise_dn=1.0, dark_dn=20.0,
                     zstack_half_planes=10)


def make_sample(out_dir) -> Path:
    """Write the sample session to ``out_dir`` (replacing it) and return the folder."""
    out = Path(out_dir)
    if out.exists():
        shutil.rmtree(out)
    write_session(scenario_config("drift", **SAMPLE_CONFIG), out, layout="multipage", compression="zlib")
    return out


if __name__ == "__main__":
    target = sys.argv[1] if len(sys.argv) > 1 else str(Path(__file__).resolve().parents[2] / "sample_frames")
    folder = make_sample(target)
    total = sum(p.stat().st_size for p in folder.rglob("*") if p.is_file())
    print(f"{folder}: {total / 2**20:.2f} MiB")

"""Command-line front of the simulator: ``qcmon simulate OUT [options]`` (wired by :mod:`qcmon.cli`)."""

from __future__ import annotations

import argparse

from qcmon.simulate._config import LAYOUTS
from qcmon.simulate.scenarios import SCENARIOS, scenario_config

__all__ = ["add_arguments", "run", "main_simulate"]


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Add the simulator's options to ``parser``."""
    parser.add_argument("out", metavar="OUT", help="session folder to create")
    parser.add_argument("--scenario", choices=sorted(SCENARIOS), default="clean",
                        help="planted events (default: clean)")
    parser.add_argument("--frames", type=int, default=300, help="time points (default 300)")
    parser.add_argument("--size", type=int, nargs=2, metavar=("H", "W"), default=(256, 256),
                        help="frame size in px (default 256 256)")
    parser.add_argument("--rate", type=float, default=30.0, help="time points per second, Hz (default 30)")
    parser.add_argument("--seed", type=int, default=0, help="random seed (default 0)")
    parser.add_argument("--channels", type=int, default=1, help="channels; 1 and up are structural")
    parser.add_argument("--planes", type=int, default=1, help="planes per time point")
    parser.add_argument("--photons", type=float, default=None, help="mean photons per pixel at the start")
    parser.add_argument("--bits", type=int, choices=range(8, 17), default=None, metavar="N",
                        help="digitiser bit depth 8..16, stored in 16-bit pages (default 12)")
    parser.add_argument("--read-noise", type=float, default=None, metavar="DN",
                        help="Gaussian read noise of the detector, DN (default 8)")
    parser.add_argument("--shutter-closed", type=float, default=None, metavar="S",
                        help="the shutter is closed for the first S seconds (dark frames)")
    parser.add_argument("--saturated-patch", type=float, nargs=2, default=None, metavar=("START_S", "END_S"),
                        help="a stationary saturated patch (a light leak) over a sixteenth of the field")
    parser.add_argument("--bright-cells", type=int, default=None, metavar="N",
                        help="N somata bright enough to saturate the detector")
    parser.add_argument("--pixel-size", type=float, default=1.0, help="µm per px (default 1)")
    parser.add_argument("--z-drift", type=float, default=None, help="focal drift, µm/min (+ deeper)")
    parser.add_argument("--line-offset", type=float, default=0.0, help="odd-row offset, px (+ toward columns)")
    parser.add_argument("--layout", choices=LAYOUTS, default="multipage", help="how frames are written")
    parser.add_argument("--chunk-frames", type=int, default=100, help="time points per chunk file")
    parser.add_argument("--zero-pad", type=int, default=5, help="digits in file numbers (0: run_2.tif)")
    parser.add_argument("--live", action="store_true", help="write at the real frame rate")
    parser.add_argument("--direct", action="store_true",
                        help="per-frame files: write the final name directly (no temporary name)")
    parser.add_argument("--no-ome", action="store_true", help="no OME-XML in the frame files")
    parser.add_argument("--overwrite", action="store_true", help="allow a non-empty OUT/frames")


def run(args: argparse.Namespace) -> int:
    """Write the session described by parsed ``args``; return the exit code (130 on Ctrl-C)."""
    from qcmon.simulate._write import write_session  # the simulator itself loads only when it is run

    overrides = {"n_frames": args.frames, "height": args.size[0], "width": args.size[1],
                 "frame_rate_hz": args.rate, "seed": args.seed, "channels": args.channels,
                 "planes": args.planes, "pixel_size_um": args.pixel_size,
                 "line_offset_px": args.line_offset}
    for key, value in (("bits", args.bits), ("read_noise_dn", args.read_noise),
                       ("shutter_closed_s", args.shutter_closed), ("bright_cells", args.bright_cells)):
        if value is not None:
            overrides[key] = value
    if args.saturated_patch is not None:
        overrides["saturated_patch"] = (*args.saturated_patch, 0.2, 0.55, 0.25, 0.25)
    if args.photons is not None:
        overrides["mean_photons_per_px"] = args.photons
    if args.z_drift is not None:
        overrides["z_drift_um_per_min"] = args.z_drift
    try:
        config = scenario_config(args.scenario, **overrides)
        info = write_session(config, args.out, layout=args.layout, chunk_frames=args.chunk_frames,
                             live=args.live, ome=not args.no_ome, zero_pad=args.zero_pad,
                             atomic=not args.direct, overwrite=args.overwrite)
    except KeyboardInterrupt:
        return 130
    except (ValueError, FileExistsError) as exc:
        print(f"qcmon simulate: {exc}")
        return 2
    print(f"wrote {config.n_pages} pages ({args.scenario}) to {info['frames_dir']}")
    return 0


def main_simulate(argv: list[str] | None = None) -> int:
    """Parse ``argv`` (without the program name) and run."""
    parser = argparse.ArgumentParser(prog="qcmon simulate", description="Write a simulated imaging session.")
    add_arguments(parser)
    return run(parser.parse_args(argv))

"""The ``qcmon`` command. It only parses options and hands over; the work is done elsewhere."""

from __future__ import annotations

import argparse
import os
import sys
from pathlib import Path

from qcmon import __version__
from qcmon.arguments import EXIT_ERROR, EXIT_INTERRUPTED, EXIT_OK, finite, positive, raw_dtype
from qcmon.errors import QcmonError, display_path

#: Threads of the linear-algebra library (OpenBLAS) for the ``qcmon`` command, unless the environment says otherwise:
#: the monitor measures with one (``Monitor.run``), and a library that starts more when it loads costs 0.1 s of
#: processor time at start-up (in this process and in each helper process, which inherit the setting). Set before
#: numpy loads, so this module imports nothing that loads it.
BLAS_THREADS = "1"

def _add_acquisition(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group("acquisition facts (used when the files do not carry them)")
    g.add_argument("--frame-rate", type=positive(float), metavar="HZ", help="time points per second")
    g.add_argument("--pixel-size", type=positive(float), metavar="UM", help="pixel size in µm")
    g.add_argument("--bit-depth", type=int, choices=range(8, 17), metavar="N",
                   help="detector bit depth (8..16); the saturation level is 2^N − 1 (default: where the data pile up, "
                        "else the dtype's maximum)")
    g.add_argument("--dark-level", type=finite, metavar="DN",
                   help="detector offset in DN (default: estimated by photon transfer)")
    g.add_argument("--zstack", type=Path, metavar="FILE", help="reference z-stack TIFF, superficial → deep")
    g.add_argument("--z-step", type=positive(float), metavar="UM", help="plane spacing of the z-stack in µm")
    g.add_argument("--channels", type=positive(int), metavar="N", help="channels interleaved page by page")
    g.add_argument("--planes", type=positive(int), metavar="N", help="planes interleaved page by page")
    g.add_argument("--motion-channel", type=int, metavar="C",
                   help="measure motion on channel C and apply it to the others")
    g.add_argument("--raw-dtype", type=raw_dtype, metavar="DTYPE", help="pixel type of raw streams without a sidecar, e.g. uint16")
    g.add_argument("--raw-shape", type=int, nargs=2, metavar=("H", "W"), help="frame size of raw streams")
    g.add_argument("--dataset", metavar="PATH",
                   help="the image series to read in an HDF5, NWB or Zarr file (a dataset path or NWB series name); "
                        "needed when the file holds several")
    p.add_argument("--profile", default="default", metavar="NAME|FILE",
                   help="threshold profile: a name from thresholds/ or a TOML file (default: %(default)s)")
    p.add_argument("--out", type=Path, metavar="DIR",
                   help="where the record goes (default: beside the session, SESSION.qcmon)")


def _options(args, *, follow: bool):
    from qcmon.monitor.loop import MonitorOptions

    return MonitorOptions(
        path=args.path, out_dir=args.out, profile=args.profile, follow=follow,
        poll_interval_s=getattr(args, "poll", None), until_idle_s=getattr(args, "until_idle", None),
        on_alarm=getattr(args, "on_alarm", None), frame_rate_hz=args.frame_rate, pixel_size_um=args.pixel_size,
        bit_depth=args.bit_depth, dark_level=args.dark_level, zstack=args.zstack, z_step_um=args.z_step,
        motion_channel=args.motion_channel, channels=args.channels, planes=args.planes,
        raw_dtype=args.raw_dtype, raw_shape=tuple(args.raw_shape) if args.raw_shape else None, dataset=args.dataset,
        resume=not getattr(args, "restart", False), workers=getattr(args, "workers", 1),
        # a finished session: the report's plots are drawn by two processes that load matplotlib meanwhile
        plot_processes=0 if follow else 2)


_RESTART_HELP = "start a new record; an earlier one in --out is moved into --out/earlier-YYYYMMDD-HHMMSS"
#: The subcommands, in the order of the help.
COMMANDS = ("summarize", "watch", "profiles", "simulate", "audit", "demo")


def build_parser(only: str | None = None) -> argparse.ArgumentParser:
    """The command line; with ``only``, just that subcommand gets its options (the others are listed by name and
    help: their options would load the simulator and the audit, about 0.2 s, for nothing)."""
    parser = argparse.ArgumentParser(
        prog="qcmon", description="Quality control of fluorescence imaging sessions, live or after the fact.")
    parser.add_argument("--version", action="version", version=f"qcmon {__version__}")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    def command(name: str, help: str) -> argparse.ArgumentParser | None:
        p = sub.add_parser(name, help=help)
        return p if only is None or only == name else None

    p = command("summarize", "measure a finished session (folder, TIFF, HDF5, NWB or Zarr) and write its record")
    if p is not None:
        p.add_argument("path", type=Path, metavar="PATH")
        _add_acquisition(p)
        p.add_argument("--restart", action="store_true", help=_RESTART_HELP)
        p.add_argument("--workers", type=positive(int), default=1, metavar="N",
                       help="processes measuring chunks of a long session side by side, the reference carried "
                            "across (default: %(default)s)")
        p.set_defaults(func=cmd_summarize)

    p = command("watch", "follow a session folder while the microscope writes it")
    if p is not None:
        p.add_argument("path", type=Path, metavar="DIR")
        _add_acquisition(p)
        p.add_argument("--poll", type=positive(float), metavar="SECONDS",
                       help="look for changes every SECONDS instead of file-system events (network shares)")
        p.add_argument("--until-idle", type=positive(float), metavar="SECONDS",
                       help="end the watch when no new frame came for SECONDS")
        p.add_argument("--plain", action="store_true", help="line output instead of the dashboard")
        p.add_argument("--on-alarm", metavar="COMMAND",
                       help="run COMMAND when an alarm begins, with the event as JSON on its standard input")
        p.add_argument("--restart", action="store_true", help=_RESTART_HELP)
        p.set_defaults(func=cmd_watch)

    p = command("profiles", "list the threshold profiles")
    if p is not None:
        p.set_defaults(func=cmd_profiles)

    p = command("simulate", "write a synthetic session with known ground truth")
    if p is not None:
        from qcmon.simulate import cli as sim_cli

        sim_cli.add_arguments(p)
        p.set_defaults(func=sim_cli.run)

    p = command("audit", "measure many finished sessions; a table, verdicts and chronic trends")
    if p is not None:
        from qcmon.audit import cli as audit_cli

        audit_cli.add_arguments(p)
        p.set_defaults(func=audit_cli.run)

    p = command("demo", "watch a session the simulator writes live (nothing else needed)")
    if p is not None:
        p.add_argument("--plain", action="store_true", help="line output instead of the dashboard")
        p.add_argument("--seconds", type=positive(float), default=None, metavar="S",
                       help="length of the simulated session (default: the scenario's)")
        p.add_argument("--out", type=Path, metavar="DIR", help="keep the session and its record here")
        p.set_defaults(func=cmd_demo)
    return parser


def main(argv: list[str] | None = None) -> int:
    os.environ.setdefault("OPENBLAS_NUM_THREADS", BLAS_THREADS)  # before numpy loads (see BLAS_THREADS)
    argv = sys.argv[1:] if argv is None else list(argv)
    named = next((a for a in argv if not a.startswith("-")), None)  # the only options before it are -h, --version
    parser = build_parser(only=named if named in COMMANDS else None)
    args = parser.parse_args(argv)
    try:
        return int(args.func(args) or 0)
    except QcmonError as err:
        print(f"qcmon: {err}", file=sys.stderr)
        return EXIT_ERROR
    except KeyboardInterrupt:
        print("qcmon: aborted; the rows and events recorded so far are kept, no summary or report was written "
              "(running the same command again resumes the record and writes them)", file=sys.stderr)
        return EXIT_INTERRUPTED
    except BrokenPipeError:
        # the reader of our output went away (``qcmon profiles | head``): the way the Python documentation advises
        # (signal module, "Note on SIGPIPE"): point stdout at devnull so that the exit flush does not fail again
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return EXIT_ERROR


def cmd_summarize(args) -> int:
    from qcmon.frames import RATE_UNKNOWN
    from qcmon.ui.console import format_event
    from qcmon.monitor.loop import Monitor

    mon = Monitor(_options(args, follow=False))

    class _Problems:
        def on_rows(self, rows):
            pass

        def on_status(self, st):
            pass

        def on_event(self, ev):
            if ev.kind == "problem":
                print(format_event(ev), file=sys.stderr)

    paths = mon.run(_Problems())
    if "frame_rate_hz" not in mon.facts.facts and not mon.timed:
        print(f"qcmon: {RATE_UNKNOWN}: times, durations and per-minute values (bleaching) are blank",
              file=sys.stderr)
    if "earlier" in paths:
        print(f"earlier record moved to {display_path(paths['earlier'])}")
    print(f"verdict: {paths['verdict']}")
    print(f"summary: {display_path(paths['summary'])}\nreport:  {display_path(paths['report'])}\n"
          f"traces:  {display_path(Path(paths['out_dir']) / 'traces.csv')}")
    return EXIT_OK


def cmd_watch(args) -> int:
    from qcmon.monitor.loop import Monitor

    from qcmon.ui.watch import run_watch

    plain = args.plain or not sys.stdout.isatty()
    return run_watch(Monitor(_options(args, follow=True)), plain=plain)


def cmd_profiles(args) -> int:
    from qcmon.thresholds import list_profiles, load_profile

    for name in list_profiles():
        prof = load_profile(name)
        print(f"{name:22s} {prof.description}")
    return EXIT_OK


def cmd_demo(args) -> int:
    from qcmon.demo import run_demo

    return run_demo(plain=args.plain or not sys.stdout.isatty(), seconds=args.seconds, out=args.out)

"""``qcmon audit``: options and hand-over to :func:`qcmon.audit.run_audit` (wired into :mod:`qcmon.cli`)."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from qcmon.audit._chronic import SAME_FIELD_CORR
from qcmon.arguments import finite, positive, raw_dtype
from qcmon.errors import QcmonError


def _fraction(text: str) -> float:
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number, got {text!r}") from None
    if not 0 < v <= 1:
        raise argparse.ArgumentTypeError(f"must be in (0, 1], got {text!r}")
    return v


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Add the options of ``qcmon audit`` to ``parser``."""
    parser.add_argument("roots", nargs="+", type=Path, metavar="ROOT", help="archive folder(s) to audit")
    parser.add_argument("--out", type=Path, metavar="DIR",
                        help="where audit.csv, chronic.csv, audit.html and the session records go "
                             "(default: ./qcmon-audit)")
    parser.add_argument("--profile", default="default", metavar="NAME|FILE",
                        help="threshold profile: a name from thresholds/ or a TOML file (default: %(default)s)")
    parser.add_argument("--workers", type=positive(int), default=1, metavar="N",
                        help="sessions measured in parallel by local processes (default: %(default)s)")
    parser.add_argument("--cluster", metavar="ADDRESS",
                        help="measure on a dask.distributed scheduler, e.g. tcp://10.0.0.5:8786")
    parser.add_argument("--only-flagged", action="store_true",
                        help="list only sessions that failed, warned or could not be read")
    parser.add_argument("--no-fail-exit", action="store_true",
                        help="exit 0 even when sessions or fields are flagged (still 2 on a usage error)")
    parser.add_argument("--remeasure", action="store_true",
                        help="measure every session again even when its record is current")
    parser.add_argument("--quiet", action="store_true", help="no progress on stderr")
    g = parser.add_argument_group("chronic imaging (the same field of view over days)")
    g.add_argument("--group-by", metavar="REGEX",
                   help="regular expression on the relative path naming the field of view (named group 'field', "
                        "else group 1, else the match), e.g. '^(mouse\\d+/fov\\d+)/'; default: match the sessions' "
                        "reference images")
    g.add_argument("--same-field-corr", type=_fraction, default=SAME_FIELD_CORR, metavar="R",
                   help="correlation of registered reference images from which two sessions show the same field "
                        "(default: %(default)s)")
    g.add_argument("--shift-limit", type=positive(float), default=10.0, metavar="UM",
                   help="flag a field that moved more than this between sessions, µm (default: %(default)s)")
    g.add_argument("--fade-limit", type=positive(float), default=10.0, metavar="PCT_PER_WEEK",
                   help="flag a field whose brightness falls faster than this, %%/week (default: %(default)s)")
    a = parser.add_argument_group("acquisition facts (used when the files do not carry them)")
    a.add_argument("--frame-rate", type=positive(float), metavar="HZ", help="time points per second")
    a.add_argument("--pixel-size", type=positive(float), metavar="UM", help="pixel size in µm")
    a.add_argument("--bit-depth", type=int, choices=range(8, 17), metavar="N", help="detector bit depth (8..16)")
    a.add_argument("--dark-level", type=finite, metavar="DN", help="detector offset in DN")
    a.add_argument("--z-step", type=positive(float), metavar="UM",
                   help="plane spacing of the sessions' zstack*.tif files in µm")
    a.add_argument("--no-zstack", action="store_true", help="ignore zstack*.tif files beside the sessions")
    a.add_argument("--channels", type=positive(int), metavar="N", help="channels interleaved page by page")
    a.add_argument("--planes", type=positive(int), metavar="N", help="planes interleaved page by page")
    a.add_argument("--raw-dtype", type=raw_dtype, metavar="DTYPE", help="pixel type of raw streams without a sidecar")
    a.add_argument("--raw-shape", type=int, nargs=2, metavar=("H", "W"), help="frame size of raw streams")


def options_from_args(args: argparse.Namespace):
    """:class:`~qcmon.audit.AuditOptions` from parsed arguments."""
    from qcmon.audit._run import AuditOptions

    return AuditOptions(
        roots=list(args.roots), out_dir=args.out if args.out is not None else Path("qcmon-audit"),
        profile=args.profile, workers=args.workers, cluster=args.cluster, only_flagged=args.only_flagged,
        group_by=args.group_by, same_field_corr=args.same_field_corr, shift_limit_um=args.shift_limit,
        fade_limit_pct_per_week=args.fade_limit, force=args.remeasure, use_zstack=not args.no_zstack,
        monitor={"frame_rate_hz": args.frame_rate, "pixel_size_um": args.pixel_size, "bit_depth": args.bit_depth,
                 "dark_level": args.dark_level, "z_step_um": args.z_step, "channels": args.channels,
                 "planes": args.planes, "raw_dtype": args.raw_dtype,
                 "raw_shape": list(args.raw_shape) if args.raw_shape else None})


def run(args: argparse.Namespace) -> int:
    """Run ``qcmon audit``; returns the exit status (0 all pass, 1 flagged, 2 usage or configuration error)."""
    from qcmon.audit._run import EXIT_FLAGGED, EXIT_OK, EXIT_USAGE, run_audit

    try:
        opts = options_from_args(args)
        result = run_audit(opts, progress=not getattr(args, "quiet", False))
    except (QcmonError, ValueError) as err:
        print(f"qcmon audit: {err}", file=sys.stderr)
        return EXIT_USAGE
    except OSError as err:
        print(f"qcmon audit: {err}", file=sys.stderr)
        return EXIT_USAGE
    n = len(result["rows"])
    print(f"{n} sessions: {result['measured']} measured, {result['reused']} reused (record current), "
          f"{result['errors']} could not be read", file=sys.stderr)
    for f in result["flagged"]:
        print(f"  flagged: {f}", file=sys.stderr)
    print(f"audit: {result['audit_csv']}\nchronic: {result['chronic_csv']}\nreport: {result['audit_html']}")
    if result["flagged"] and not getattr(args, "no_fail_exit", False):
        return EXIT_FLAGGED
    return EXIT_OK

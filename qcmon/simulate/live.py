"""``python -m qcmon.simulate.live OUT [options]``: write a simulated session at the real frame rate."""

from __future__ import annotations

import sys

from qcmon.simulate.cli import main_simulate


def main(argv: list[str] | None = None) -> int:
    """Same options as ``qcmon simulate``, with ``--live`` always on."""
    argv = list(sys.argv[1:] if argv is None else argv)
    if "--live" not in argv:
        argv.append("--live")
    return main_simulate(argv)


if __name__ == "__main__":
    raise SystemExit(main())

"""``python -m qcmon.audit``: the audit on its own (the same options as ``qcmon audit``)."""

from __future__ import annotations

import argparse
import sys

from qcmon.audit.cli import add_arguments, run


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(prog="qcmon audit", description="Audit finished sessions in batch.")
    add_arguments(parser)
    return run(parser.parse_args(argv))


if __name__ == "__main__":
    sys.exit(main())

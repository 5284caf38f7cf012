"""The ``coldcert`` command line.

Each job area registers its own sub-commands through an ``add_commands(subparsers)`` function in
its module, listed in ``COMMAND_MODULES``; this file only assembles them.
"""

from __future__ import annotations

import argparse
import importlib
import sys

COMMAND_MODULES: tuple[str, ...] = (
    "service.cli.run_commands",
    "service.cli.sensor_commands",
    "service.cli.service_commands",
    "service.cli.history_commands",
)


class CommandError(Exception):
    """A user-facing failure: printed as one line, exit status 2."""


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="coldcert",
        description="Calibration certificates for Coulomb-blockade thermometry and electron pumps.",
    )
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")
    for name in COMMAND_MODULES:
        importlib.import_module(name).add_commands(sub)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return int(args.handler(args) or 0)
    except CommandError as exc:
        print(f"coldcert: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("coldcert: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())

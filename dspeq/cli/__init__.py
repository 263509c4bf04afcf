"""The ``dspeq`` command line.

Each sub-command lives in its own module (``dspeq/cli/<name>.py``) that
defines ``register(subparsers)``; heavy libraries are imported inside the
command functions so that ``dspeq --help`` starts fast.
"""

from __future__ import annotations

import argparse
import importlib
import sys

from ._common import CAUTION, run_command

__all__ = ["main", "build_parser"]

#: Sub-command modules, in the order their commands appear in ``--help``.
_MODULES = ("core", "batch", "network", "identify")


def build_parser() -> argparse.ArgumentParser:
    """The full argument parser (every registered sub-command)."""
    from .. import __version__

    parser = argparse.ArgumentParser(
        prog="dspeq",
        description="Playback de-emphasis for flat tape and disc transfers: curves, digital "
                    "designs, deviation checks and batch processing.",
        epilog=CAUTION, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--version", action="version", version=f"dspeq {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True
    for name in _MODULES:
        try:
            module = importlib.import_module(f"{__name__}.{name}")
        except ModuleNotFoundError as exc:
            if exc.name != f"{__name__}.{name}":
                raise
            continue
        module.register(sub)
    return parser


def main(argv: list[str] | None = None) -> int:
    """Entry point of the ``dspeq`` console script; returns the exit status."""
    parser = build_parser()
    args = parser.parse_args(argv)
    return run_command(args)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())

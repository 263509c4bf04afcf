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


def build_parser(command: str | None = None) -> argparse.ArgumentParser:
    """The argument parser of every registered sub-command.

    Parameters
    ----------
    command : str, optional
        The sub-command about to run ("" for none, e.g. ``dspeq --help``).
        When given, a module with a ``register_summary`` sets up only the
        name and summary of its command unless that command is the one to
        run, so that e.g. ``dspeq design`` does not import the batch
        processor to describe ``dspeq batch``'s options.  By default (None)
        every command is set up completely.
    """
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
        if hasattr(module, "register_summary") and command is not None and command != module.COMMAND:
            module.register_summary(sub)
        else:
            module.register(sub)
    return parser


def _command_word(argv: list[str]) -> str:
    """The sub-command named on the command line (the top level takes no option values)."""
    return next((a for a in argv if not a.startswith("-")), "")


def main(argv: list[str] | None = None) -> int:
    """Entry point of the ``dspeq`` console script; returns the exit status."""
    argv = sys.argv[1:] if argv is None else list(argv)
    parser = build_parser(_command_word(argv))
    args = parser.parse_args(argv)
    return run_command(args)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())

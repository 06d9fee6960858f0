"""The ``epicorr`` command line (an edge of the package: no math here).

Each sub-command lives in its own module of this package exposing
``register(subparsers)``, which adds its parser and sets ``func`` to a
callable ``func(args) -> int``.  Add a command by writing such a module and
listing it in :data:`COMMAND_MODULES`.

Exit codes: 0 success, 1 some subjects failed (batch), 2 bad input
(:class:`~epicorr.errors.EpicorrInputError`, one line on stderr).
"""

from __future__ import annotations

import argparse
import importlib
import os
import sys

os.environ.setdefault("NIPYPE_NO_ET", "1")

from .._version import __version__  # noqa: E402
from ..errors import EpicorrInputError  # noqa: E402

__all__ = ["main", "build_parser", "CAUTION", "COMMAND_MODULES"]

#: Shown in ``--help``, the README and every report.
CAUTION = (
    "epicorr is a research tool, not a medical device. Check every result against an "
    "anatomical reference before relying on it. Clinical use (e.g. presurgical fMRI/DTI or "
    "lesion localisation) defers to local regulations and licensed practice."
)

#: Sub-command modules, in the order ``--help`` lists them.
COMMAND_MODULES: tuple[str, ...] = ("run", "files", "demo")

EXIT_OK, EXIT_FAILED, EXIT_BAD_INPUT = 0, 1, 2


def build_parser() -> argparse.ArgumentParser:
    """Build the top-level parser with every registered sub-command."""
    parser = argparse.ArgumentParser(
        prog="epicorr",
        description=("Correct susceptibility-induced distortion in echo-planar MRI (fMRI, "
                     "diffusion): estimate the B0 field, unwarp every volume, and mark where "
                     "signal is lost for good."),
        epilog="CAUTION: " + CAUTION,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("--version", action="version", version=f"epicorr {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name in COMMAND_MODULES:
        module = importlib.import_module(f"{__name__}.{name}")
        module.register(sub)
    return parser


def main(argv: list[str] | None = None) -> int:
    """Run the command line; returns the exit code."""
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help()
        return EXIT_BAD_INPUT
    try:
        return int(args.func(args) or 0)
    except EpicorrInputError as err:
        print(f"epicorr: error: {err}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:  # pragma: no cover - interactive
        print("epicorr: interrupted", file=sys.stderr)
        return 130

"""The ``modetick`` command: one subcommand per module ``daq.cmd_<name>``.

Each module has ``HELP``, ``configure(parser)`` and ``run(args) -> int``.
Exit codes: 0 done, 1 device fault or failed check, 2 bad input (rig file,
log, CSV, arguments), 130/143 stopped by SIGINT/SIGTERM.
"""
from __future__ import annotations

import argparse
import importlib
import signal
import sys

from daq import __version__

COMMANDS = [
    "sweep",
    "analyze",
    "simulate",
    "ports",
    "check",
    "replay",
    "modes",
    "park",
    "report",
    "export",
]

SAFETY = ("Laser safety: grating-tuned diode lasers are often Class 3B or 4 and often infrared "
          "(invisible). Wear eyewear rated for the wavelength, block the beam, never view it or "
          "its reflections, and follow your laser safety officer and local rules "
          "(IEC 60825-1, ANSI Z136.1). modetick never changes drive current or temperature "
          "unless a rig file explicitly allows it within set limits.")


class _Version(argparse.Action):
    """--version, with the counter kernels' build (looked up only when asked)."""

    def __call__(self, parser, namespace, values, option_string=None):
        from analysis import compiled
        how = ("compiled ahead of time" if compiled.MODE == "aot" else
               f"compiled by numba at first use: {compiled.WHY_JIT}")
        print(f"modetick {__version__}; counter kernels {how}")
        parser.exit()


def build_parser(only: str | None = None) -> argparse.ArgumentParser:
    """The whole command line, or (``only``) just the one command about to run: each
    command module imports what it needs, so a command loads nothing of the others."""
    parser = argparse.ArgumentParser(
        prog="modetick",
        description="Sweep a grating-tuned diode laser, count the chip's longitudinal modes live, "
                    "and report mode spacing and chip length with uncertainty.",
        epilog=SAFETY)
    parser.add_argument("--version", action=_Version, nargs=0,
                        help="show the version and how the counter's kernels are compiled, and exit")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name in COMMANDS:
        if only is not None and name != only:
            continue
        try:
            mod = importlib.import_module(f"daq.cmd_{name}")
        except ModuleNotFoundError as exc:
            if exc.name == f"daq.cmd_{name}":
                continue  # a command whose module has not landed yet
            raise
        p = sub.add_parser(name, help=mod.HELP, description=mod.HELP, epilog=SAFETY)
        mod.configure(p)
        p.set_defaults(_run=mod.run)
    return parser


def main(argv: list[str] | None = None) -> int:
    called_as_program = argv is None
    argv = sys.argv[1:] if argv is None else list(argv)
    first = next((a for a in argv if not a.startswith("-")), None)
    parser = build_parser(first if first in COMMANDS else None)
    args = parser.parse_args(argv)
    if not getattr(args, "_run", None):
        parser.print_help(sys.stderr)
        return 2
    try:
        code = int(args._run(args) or 0)
    except BrokenPipeError:
        code = 1
    if called_as_program:
        # The work is done (logs closed, results out). Python restores the default
        # SIGINT action early in its shutdown, which can take a moment after numba;
        # an interrupt then would kill the process with a different exit code. An
        # ignored signal is left ignored, so the exit code stays the command's.
        for s in (signal.SIGINT, signal.SIGTERM):
            signal.signal(s, signal.SIG_IGN)
    return code


if __name__ == "__main__":
    raise SystemExit(main())

"""Command line: a thin layer over the Python API, one module per command.

``main(argv)`` returns the exit code: 0 everything done, 1 some inputs unusable (each named on
stderr and in the table's ``status``), 2 usage or configuration error (nothing written).  Data go to
stdout, diagnostics to stderr; no traceback unless ``--debug``.
"""

from __future__ import annotations

import argparse
import os
import signal
import sys
import warnings

from lineshift._version import __version__
from lineshift.cli import inspect, mask, measure, report, series, simulate, wavecheck
from lineshift.cli.common import Parser
from lineshift.errors import ConfigError, LineshiftError, MaskError

__all__ = ["build_parser", "main"]

#: command name -> its module (each has ``add_parser(sub)`` and ``run(args) -> exit code``), in help order
COMMANDS = {"measure": measure, "mask": mask, "wavecheck": wavecheck, "series": series, "inspect": inspect,
            "simulate": simulate, "report": report}


def build_parser() -> argparse.ArgumentParser:
    """The full parser: every command and option (docs/reference.md is checked against it)."""
    parser = Parser(prog="lineshift", description="Barycentric radial velocities from reduced spectra.")
    parser.add_argument("--version", action="version", version=f"lineshift {__version__}")
    sub = parser.add_subparsers(dest="command", parser_class=Parser)
    for module in COMMANDS.values():
        module.add_parser(sub)
    return parser


def main(argv: list[str] | None = None) -> int:
    """Run the command line; returns the exit code (astropy offline for the run, restored after)."""
    import matplotlib

    from lineshift._offline import offline

    with offline(), matplotlib.rc_context({"backend": "Agg"}):
        return _main(argv)


def _main(argv: list[str] | None) -> int:
    parser = build_parser()
    raw = list(sys.argv[1:] if argv is None else argv)
    # "--velocity-range -250000,-150000": a value starting with '-' is still the option's value
    argv, k = [], 0
    while k < len(raw):
        if raw[k] == "--velocity-range" and k + 1 < len(raw) and raw[k + 1].startswith("-"):
            argv.append(f"--velocity-range={raw[k + 1]}")
            k += 2
        else:
            argv.append(raw[k])
            k += 1
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:
        return int(exc.code or 0)
    if args.command is None:
        parser.print_help(sys.stderr)
        return 2
    previous = _sigterm_as_interrupt()
    streams = sys.stdout, sys.stderr
    sys.stdout, sys.stderr = _Printable(sys.stdout), _Printable(sys.stderr)
    try:
        with warnings.catch_warnings():
            warnings.showwarning = _one_line_warning({})
            return COMMANDS[args.command].run(args)
    except (ConfigError, MaskError) as exc:
        print(f"lineshift: {exc}", file=sys.stderr)
        return 2
    except LineshiftError as exc:
        print(f"lineshift: {exc}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        print("lineshift: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        try:
            sys.stdout = open(os.devnull, "w")  # noqa: SIM115 - silence the interpreter's flush at exit
        except OSError:
            pass
        return 0
    except Exception as exc:
        if getattr(args, "debug", False):
            raise
        print(f"lineshift: unexpected error ({type(exc).__name__}: {exc}); rerun with --debug", file=sys.stderr)
        return 2
    finally:
        if isinstance(sys.stdout, _Printable):  # not when a broken pipe put /dev/null there
            sys.stdout = streams[0]
        if isinstance(sys.stderr, _Printable):
            sys.stderr = streams[1]
        if previous is not None:
            signal.signal(signal.SIGTERM, previous)


class _Printable:
    """A text stream that writes undecodable file-name bytes as ``\\xNN`` (the documented form)."""

    def __init__(self, stream):
        self._stream = stream

    def write(self, text: str) -> int:
        from lineshift.io.table import printable

        return self._stream.write(printable(text))

    def __getattr__(self, name):
        return getattr(self._stream, name)


def _one_line_warning(seen: dict):
    """A ``warnings.showwarning`` that prints each distinct message once as ``lineshift: warning: ...``.

    No source line, file name or category: a warning that reaches the user is a statement about the
    data, not about the code.
    """

    def show(message, category, filename, lineno, file=None, line=None):
        text = str(message).strip().splitlines()[0] if str(message).strip() else category.__name__
        if text not in seen:
            seen[text] = True
            print(f"lineshift: warning: {text}", file=sys.stderr)

    return show


def _sigterm_as_interrupt():
    """While a command runs, SIGTERM stops it like Ctrl-C (workers are ended); returns the old handler."""
    import threading

    if threading.current_thread() is not threading.main_thread():
        return None

    def handler(signum, frame):
        raise KeyboardInterrupt

    return signal.signal(signal.SIGTERM, handler)


if __name__ == "__main__":
    sys.exit(main())

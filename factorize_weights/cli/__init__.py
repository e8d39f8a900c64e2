"""Command line: ``factorize-weights inspect | compress | sweep | evaluate | profile``.

Exit codes: 0 success; 1 internal error (a bug: please report it); 2 bad input or usage (one line
on stderr naming the file or flag and what is wrong; ``--debug`` adds the traceback); 3 the
``--drop-limit`` gate failed (everything was written); 130/143 interrupted or terminated.

``options`` builds the parser (configuration options from the fields' metadata), ``runfile`` reads
TOML run files, ``commands`` runs each command.
"""

from __future__ import annotations

import sys
import traceback

from ..errors import InputError
from . import commands
from .options import PROG, build_parser as _build
from .runfile import apply_run_file

COMMANDS = {"inspect": commands.cmd_inspect, "compress": commands.cmd_compress, "sweep": commands.cmd_sweep,
            "evaluate": commands.cmd_evaluate, "profile": commands.cmd_profile}


def build_parser():
    """The full parser (``--help`` of every command)."""
    return _build(COMMANDS)


class _Terminated(BaseException):
    """SIGTERM, raised where the program is, so every temporary folder is removed on the way out."""


def _on_sigterm(signum, frame):
    raise _Terminated()


def main(argv: list[str] | None = None) -> int:
    import signal

    parser = build_parser()
    argv = list(sys.argv[1:] if argv is None else argv)
    args = parser.parse_args(argv)
    try:
        previous = signal.signal(signal.SIGTERM, _on_sigterm)
    except ValueError:  # not the main thread (an embedding application): leave signals alone
        previous = None
    try:
        return _run(args, parser, argv)
    finally:
        if previous is not None:
            signal.signal(signal.SIGTERM, previous)


def _run(args, parser, argv) -> int:
    try:
        if getattr(args, "config", None):
            args = apply_run_file(parser, argv, args)
        args.argv = argv
        commands._WARNINGS.clear()
        code = args.func(args)
        commands._flush_warnings()
        return code
    except InputError as exc:
        commands._WARNINGS.clear()
        if args.debug:
            traceback.print_exc()
        print(f"{PROG}: {commands._colour('error', '31')}: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print(f"{PROG}: interrupted", file=sys.stderr)
        return 130
    except _Terminated:
        print(f"{PROG}: terminated (SIGTERM); no partial output is left", file=sys.stderr)
        return 143
    except BrokenPipeError:  # stdout closed early (| head): not an error of ours
        import os

        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 0
    except Exception as exc:  # a bug in this tool
        if args.debug:
            traceback.print_exc()
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else ""
        print(f"{PROG}: internal error: {type(exc).__name__}: {first} (rerun with --debug for a traceback)",
              file=sys.stderr)
        return 1

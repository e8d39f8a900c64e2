"""Run files: every option of a command from a TOML file (flags on the command line win). The keys
are the long option names; each value is checked against the option it sets, as the command line
would check it, and unknown keys are refused by name."""

from __future__ import annotations

import argparse

from ..errors import InputError


def _run_file_value(path, key: str, value, action):
    """Check a run-file value against the option it sets, as the command line would."""
    def bad(expected: str):
        return InputError(f"--config {path}: {key} must be {expected}; got {value!r}")

    if isinstance(action, (argparse._StoreTrueAction, argparse.BooleanOptionalAction)):
        if not isinstance(value, bool):
            raise bad("true or false")
    elif isinstance(action, argparse._AppendAction):
        if not (isinstance(value, list) and all(isinstance(v, str) for v in value)):
            raise bad("a string or a list of strings")
    elif action.type in (int, float):
        if isinstance(value, bool) or not isinstance(value, (int, float)) or (action.type is int and not isinstance(value, int)):
            raise bad("an integer" if action.type is int else "a number")
        value = action.type(value)
    elif not isinstance(value, str):
        raise bad("a string (quote it in TOML)")
    if action.choices is not None and value not in action.choices and not isinstance(value, list):
        raise bad(f"one of {', '.join(map(str, action.choices))}")
    return value


def apply_run_file(parser, argv: list[str], args):
    """Re-parse with the TOML run file's values as defaults: flags on the command line win.
    Keys are the long option names (``rank-step`` or ``rank_step``); unknown keys are
    refused by name."""
    try:
        import tomllib
    except ModuleNotFoundError:  # Python 3.10
        import tomli as tomllib
    from pathlib import Path

    from ..data import file_sha256

    path = Path(args.config)
    if path.is_dir():
        raise InputError(f"--config {path}: is a folder; give the TOML run file")
    if not path.is_file():
        raise InputError(f"--config {path}: file does not exist")
    try:
        values = tomllib.loads(path.read_text(encoding="utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise InputError(f"--config {path}: not valid TOML ({exc})") from exc
    sub = parser._subcommands[args.command]
    actions = {a.dest: a for a in sub._actions if a.dest not in ("help", "config", "func", "model_path")}
    defaults, unknown = {}, []
    for key, value in values.items():
        dest = key.replace("-", "_")
        if dest not in actions:
            unknown.append(key)
            continue
        if dest == "budgets" and isinstance(value, list):
            value = ",".join(str(v) for v in value)
        if dest in ("only", "skip") and isinstance(value, str):
            value = [value]
        defaults[dest] = _run_file_value(path, key, value, actions[dest])
    if unknown:
        raise InputError(f"--config {path}: unknown key(s) {', '.join(sorted(unknown))} for '{args.command}'")
    sub.set_defaults(**defaults)
    new = parser.parse_args(argv)
    new.config_file = {"path": str(path), "sha256": file_sha256(path), "values": values}
    return new



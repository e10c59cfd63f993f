"""What both command lines share: one clear line for an error, exit codes, atomic file writes."""

from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

from .errors import ValidationToolError

EXIT_OK, EXIT_USER, EXIT_REFUSED, EXIT_PARTIAL, EXIT_OFFLINE = 0, 1, 2, 3, 4


def _hiding(formatter: type[argparse.HelpFormatter]) -> type[argparse.HelpFormatter]:
    """A help formatter like ``formatter`` that leaves the old spellings of an option out of ``--help``."""

    class Hiding(formatter):  # type: ignore[misc, valid-type]
        def _format_action_invocation(self, action: argparse.Action) -> str:
            shown = [s for s in action.option_strings if s not in getattr(action, "old_spellings", ())]
            if not action.option_strings or shown == action.option_strings:
                return super()._format_action_invocation(action)
            saved = action.option_strings
            action.option_strings = shown
            try:
                return super()._format_action_invocation(action)
            finally:
                action.option_strings = saved

    return Hiding


def option(parser: argparse.ArgumentParser, name: str, *old: str, **kwargs: Any) -> argparse.Action:
    """Add option ``name`` that also accepts the old spellings ``old`` (same destination), which ``--help``
    does not show: options were renamed (folders end in ``-dir``, ``--roc-bands`` ...) and the old names are
    kept for one more round so that scripts written against them keep working."""
    action = parser.add_argument(name, *old, **kwargs)
    action.old_spellings = old  # type: ignore[attr-defined]
    return action


def examples(*lines: str) -> str:
    """A sub-command's ``--help`` epilog: one or more example command lines (with RawDescriptionHelpFormatter)."""
    return "example:\n" + "\n".join(f"  {line}" for line in lines)


def finish_parser(parser: argparse.ArgumentParser) -> argparse.ArgumentParser:
    """Every parser and sub-parser: hide old spellings in ``--help`` and name an option by its new spelling
    in error lines (``--site-dir``, never ``--site-dir/--site``)."""
    stack = [parser]
    while stack:
        current = stack.pop()
        if not getattr(current.formatter_class, "_hides_old_spellings", False):
            current.formatter_class = _hiding(current.formatter_class)
            current.formatter_class._hides_old_spellings = True  # type: ignore[attr-defined]
        for action in current._actions:
            if isinstance(action, argparse._SubParsersAction):
                stack.extend(action.choices.values())
    return parser


class _UsageError(Exception):
    """argparse found a usage error (printed already); the command exits with EXIT_USER."""


class ArgumentParser(argparse.ArgumentParser):
    """argparse, except that a usage error exits with code 1 (the documented code for usage or input errors)
    instead of argparse's 2, which this tool reserves for a refusal."""

    def error(self, message: str) -> None:  # type: ignore[override]
        for action in self._actions:
            if getattr(action, "old_spellings", ()):
                message = message.replace("/".join(action.option_strings), action.option_strings[0])
        self.print_usage(sys.stderr)
        print(f"{self.prog}: error: {message}", file=sys.stderr)
        raise _UsageError(message)


def write_atomic(path: Path, data: bytes, mode: int = 0o644) -> None:
    """Write ``data`` to ``path`` so that a reader sees the old file or the whole new one, never half."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.")
    try:
        with os.fdopen(fd, "wb") as handle:
            handle.write(data)
            handle.flush()
            os.fsync(handle.fileno())
        os.chmod(tmp, mode)
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def print_json(value: Any) -> None:
    json.dump(value, sys.stdout, indent=2, sort_keys=False)
    sys.stdout.write("\n")


def run_cli(parser: argparse.ArgumentParser, argv: Sequence[str] | None, prog: str) -> int:
    """Parse, dispatch to ``args.handler`` and turn known errors into one line and an exit code.

    A usage error exits 1; output cut short by a closed pipe (``site-agent review | head``) ends quietly.
    """
    finish_parser(parser)
    try:
        args = parser.parse_args(argv)
    except _UsageError:
        return EXIT_USER
    except SystemExit as exc:  # a parser built without our class: argparse's usage error is code 2
        if exc.code == 2:
            return EXIT_USER
        raise
    handler: Callable[[argparse.Namespace], int | None] | None = getattr(args, "handler", None)
    if handler is None:
        parser.print_help()
        return EXIT_USER
    try:
        return handler(args) or EXIT_OK
    except BrokenPipeError:
        _quiet_stdout()
        return EXIT_OK
    except ValidationToolError as exc:
        print(f"{prog}: error: {exc}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print(f"{prog}: interrupted", file=sys.stderr)
        return 130
    except OSError as exc:
        name = f"{exc.filename}: " if exc.filename else ""
        print(f"{prog}: error: {name}{exc.strerror or exc}", file=sys.stderr)
        return EXIT_USER


def _quiet_stdout() -> None:
    """The reader closed the pipe (``| head``): send what is left to /dev/null so that Python's own flush at
    exit does not print a broken-pipe error."""
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        os.close(devnull)
    except (OSError, ValueError):
        pass

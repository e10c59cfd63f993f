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

EXIT_OK, EXIT_USER, EXIT_REFUSED, EXIT_PARTIAL = 0, 1, 2, 3


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
    """Parse, dispatch to ``args.handler`` and turn known errors into one line and an exit code."""
    args = parser.parse_args(argv)
    handler: Callable[[argparse.Namespace], int | None] | None = getattr(args, "handler", None)
    if handler is None:
        parser.print_help()
        return EXIT_USER
    try:
        return handler(args) or EXIT_OK
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

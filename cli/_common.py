"""Shared helpers for CLI commands: error handling, JSON output, cautions."""

from __future__ import annotations

import functools
import json
import os
import sys
import tomllib
from typing import Any, Callable

import typer

from bos.errors import BOSError

EXIT_USER_ERROR = 2
EXIT_INTERNAL = 1


def fail(message: str, code: int = EXIT_USER_ERROR) -> "typer.Exit":
    """Print a one-line error to stderr and return the Exit to raise."""
    line = " ".join(str(message).split())
    typer.echo(f"error: {line}", err=True)
    return typer.Exit(code)


def handle_errors(func: Callable) -> Callable:
    """Decorator for command bodies: turn library errors into one-line messages.

    ``BOSError`` (bad input) and file-system errors exit with code 2;
    anything unexpected exits with code 1 and a one-line summary (set
    ``BOS_DEBUG=1`` to see the traceback).
    """

    @functools.wraps(func)
    def wrapper(*args: Any, **kwargs: Any):
        try:
            return func(*args, **kwargs)
        except typer.Exit:
            raise
        except BOSError as exc:
            raise fail(str(exc)) from None
        except tomllib.TOMLDecodeError as exc:
            raise fail(f"experiment file is not valid TOML: {exc}") from None
        except FileNotFoundError as exc:
            raise fail(f"file not found: {exc.filename or exc}") from None
        except PermissionError as exc:
            raise fail(f"permission denied: {exc.filename or exc}") from None
        except OSError as exc:
            raise fail(f"file error: {exc}") from None
        except KeyboardInterrupt:
            raise fail("interrupted", code=130) from None
        except Exception as exc:  # noqa: BLE001 - last resort, never a traceback
            if os.environ.get("BOS_DEBUG"):
                raise
            raise fail(
                f"internal error ({type(exc).__name__}: {exc}); rerun with BOS_DEBUG=1 for details",
                code=EXIT_INTERNAL,
            ) from None

    return wrapper


def emit_json(obj: Any) -> None:
    """Write ``obj`` as JSON on stdout (numpy scalars/arrays converted)."""

    def default(o: Any):
        try:
            import numpy as np

            if isinstance(o, np.generic):
                return o.item()
            if isinstance(o, np.ndarray):
                return o.tolist()
        except ImportError:  # pragma: no cover
            pass
        if hasattr(o, "__dict__"):
            return vars(o)
        return str(o)

    sys.stdout.write(json.dumps(obj, default=default, indent=2, allow_nan=True) + "\n")

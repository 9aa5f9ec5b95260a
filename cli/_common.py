"""Shared helpers for CLI commands: error handling, JSON output, cautions."""

from __future__ import annotations

import enum
import functools
import inspect
import json
import math
import os
import re
import sys
import tomllib
from pathlib import Path
from typing import Any, Callable, Optional

import typer

from bos.errors import BOSError, ConfigError

EXIT_USER_ERROR = 2
EXIT_INTERNAL = 1


def fail(message: str, code: int = EXIT_USER_ERROR) -> "typer.Exit":
    """Print a one-line error to stderr and return the Exit to raise."""
    line = " ".join(str(message).split())
    typer.echo(f"error: {line}", err=True)
    return typer.Exit(code)


def handle_errors(func: Callable) -> Callable:
    """Decorator for command bodies: turn library errors into one-line messages.

    ``BOSError`` (bad input), malformed JSON read from a file and file-system
    errors exit with code 2;
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
        except json.JSONDecodeError as exc:  # only files we read hold JSON: a damaged or edited input
            raise fail(f"malformed JSON in an input file ({exc.msg} at line {exc.lineno} column {exc.colno})") from None
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
    """Write ``obj`` as strict JSON on stdout.

    numpy scalars/arrays are converted, and NaN/Infinity (not JSON) become
    ``null`` so every JSON parser reads the output.
    """
    sys.stdout.write(json.dumps(strict_json(obj), indent=2, allow_nan=False) + "\n")


# ---------------------------------------------------------------------------
# Options that set experiment-file keys: one spelling (and the same aliases)
# in every command, help/choices/defaults taken from bos.config.SCHEMA.
# ---------------------------------------------------------------------------

ALIASES: dict[str, tuple[str, ...]] = {
    "camera.focal_length_mm": ("--focal-mm",),
    "camera.pixel_pitch_um": ("--pixel-um",),
    "geometry.camera_to_object_m": ("--za-m",),
    "geometry.object_to_background_m": ("--zd-m",),
    "geometry.camera_to_background_m": ("--zb-m",),
    "geometry.object_width_mm": ("--width-mm",),
}
"""Short spellings accepted beside the canonical option (same in every command)."""

_BOOL_OFF = {"output.figures": "--no-figures", "reconstruction.weighted": "--unweighted"}


def _default_text(spec: Any) -> str | bool:
    if spec.default is None:
        return False
    if isinstance(spec.default, bool):
        return "yes" if spec.default else "no"
    return str(spec.default)


def key_option(dotted: str, *, default: Any = None, convert: Callable[[Any], Any] | None = None,
               help: str | None = None, hidden: bool = False, metavar: str | None = None) -> Any:
    """A ``typer.Option`` for the experiment key ``section.key``.

    The option name, aliases, help text, choices and shown default come from
    :data:`bos.config.SCHEMA`; the default ``None`` means "not given" (the file
    or the schema default applies).  :func:`key_overrides` turns the values of
    such options into ``load_experiment`` overrides (``convert`` maps the
    option value to the file value first).
    """
    from bos.config import SCHEMA, option_name, range_text

    section, key = dotted.split(".", 1)
    spec = SCHEMA[section][key]
    name = option_name(dotted)
    text = help or spec.help
    if spec.kind in ("float", "int") and (spec.positive or spec.lo is not None or spec.hi is not None):
        text += f"; {range_text(spec)}"
    if default is None and spec.default is not None:  # not given = the file's value, else the schema default
        text += f"  [default: {_default_text(spec)}]"
    if spec.kind == "bool":
        decls = [f"{name}/{_BOOL_OFF.get(dotted, '--no-' + name[2:])}"]
    else:
        decls = [name, *ALIASES.get(dotted, ())]
    info = typer.Option(default, *decls, help=text, show_default=default is not None, hidden=hidden,
                        metavar=metavar)
    info.bos_key = dotted
    info.bos_convert = convert
    return info


_CHOICE_TYPES: dict[tuple[str, tuple[str, ...]], type[enum.Enum]] = {}


def choice_type(name: str, values: tuple[str, ...]) -> type[enum.Enum]:
    """A ``str`` Enum of ``values``: typer turns it into a choice type shown in ``--help``.

    (An Enum rather than ``Literal``: every supported typer version accepts it.)
    """
    key = (name, tuple(values))
    if key not in _CHOICE_TYPES:
        _CHOICE_TYPES[key] = enum.Enum(name, {v: v for v in values}, type=str)
    return _CHOICE_TYPES[key]


def choices(dotted: str) -> type[enum.Enum]:
    """The choice type of the allowed values of the experiment key ``section.key``."""
    from bos.config import SCHEMA

    section, key = dotted.split(".", 1)
    return choice_type("".join(w.title() for w in f"{section}_{key}".split("_")), SCHEMA[section][key].choices)


def plain(value: Any) -> Any:
    """The plain value of a choice option (Enum member -> its string)."""
    return value.value if isinstance(value, enum.Enum) else value


def key_overrides(func: Callable, values: dict[str, Any]) -> dict[str, Any]:
    """``{"section.key": value}`` overrides from the :func:`key_option` parameters of ``func``.

    ``values`` are the parameter values (``locals()`` of the command body);
    options left at ``None`` are skipped, so the experiment file applies.
    """
    out: dict[str, Any] = {}
    for pname, param in inspect.signature(func).parameters.items():
        key = getattr(param.default, "bos_key", None)
        if key is None or values.get(pname) is None:
            continue
        value = plain(values[pname])
        conv = param.default.bos_convert
        out[key] = conv(value) if conv is not None else value
    return out


def abs_path(path: Optional[Path]) -> Optional[str]:
    """Absolute path string of a command-line path (relative to the current directory)."""
    return None if path is None else str(Path(path).expanduser().resolve())


_NUM = r"[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?"


def _numbers(text: str, option: str, what: str) -> list[float]:
    parts = [p for p in re.split(r"[,;\s]+", text.strip()) if p]
    if not parts or not all(re.fullmatch(_NUM, p) for p in parts):
        raise ConfigError(f"{option}: expected {what}, got {text!r}")
    return [float(p) for p in parts]


def parse_profile(text: str) -> list[list[float]]:
    """``"x0,y0,x1,y1"`` (object-plane mm) -> ``[[x0, y0], [x1, y1]]``."""
    v = _numbers(text, "--profile", "four numbers X0,Y0,X1,Y1 in mm")
    if len(v) != 4:
        raise ConfigError(f"--profile: expected four numbers X0,Y0,X1,Y1 in mm, got {text!r}")
    return [[v[0], v[1]], [v[2], v[3]]]


def parse_polygons(texts: list[str]) -> list[list[list[float]]]:
    """Each ``"c0,r0 c1,r1 c2,r2 ..."`` (pixel column,row pairs) -> one polygon."""
    polys = []
    for text in texts:
        v = _numbers(text, "--mask-polygon", "COL,ROW pairs such as '0,0 40,0 40,300'")
        if len(v) % 2 or len(v) < 6:
            raise ConfigError(f"--mask-polygon: expected at least three COL,ROW pairs, got {text!r}")
        polys.append([[v[i], v[i + 1]] for i in range(0, len(v), 2)])
    return polys


def parse_region(text: str) -> Any:
    """A reference-region name or ``"row0,row1,col0,col1"`` (pixels) -> the file value."""
    if re.fullmatch(r"[A-Za-z_-]+", text.strip()):
        return text.strip()
    v = _numbers(text, "--reference-region", "a name (edges, left, right, top, bottom) or ROW0,ROW1,COL0,COL1")
    if len(v) != 4 or not all(x.is_integer() for x in v):
        raise ConfigError(f"--reference-region: expected four whole numbers ROW0,ROW1,COL0,COL1, got {text!r}")
    return [int(x) for x in v]


def parse_composition(text: str) -> dict[str, float]:
    """``"he=0.5,air=0.5"`` (mole fractions) -> ``{"he": 0.5, "air": 0.5}``."""
    out: dict[str, float] = {}
    for item in (p for p in re.split(r"[,;\s]+", text.strip()) if p):
        gas, sep, frac = item.partition("=")
        if not sep or not gas or not re.fullmatch(_NUM, frac):
            raise ConfigError(f"--composition: expected GAS=FRACTION,... such as he=0.5,air=0.5, got {text!r}")
        out[gas.strip()] = float(frac)
    return out


def strict_json(obj: Any) -> Any:
    """``obj`` with numpy values converted and every NaN/Infinity replaced by ``None``."""
    try:
        import numpy as np
    except ImportError:  # pragma: no cover
        np = None
    if isinstance(obj, enum.Enum):
        obj = obj.value
    if np is not None and isinstance(obj, np.ndarray):
        obj = obj.tolist()
    elif np is not None and isinstance(obj, np.generic):
        obj = obj.item()
    if isinstance(obj, float):
        return obj if math.isfinite(obj) else None
    if isinstance(obj, dict):
        return {str(k): strict_json(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple, set, frozenset)):
        return [strict_json(v) for v in obj]
    if obj is None or isinstance(obj, (str, int, bool)):
        return obj
    if isinstance(obj, Path):
        return str(obj)
    if hasattr(obj, "__dataclass_fields__") or hasattr(obj, "__dict__"):
        return strict_json(dict(vars(obj)))
    return str(obj)


def print_notes(console, *, warnings=(), cautions=(), files=()) -> None:
    """Print warnings, safety cautions and written files after a command's table (rich console)."""
    from rich.markup import escape

    for w in warnings or ():
        console.print(f"[yellow]warning:[/] {escape(str(w))}", highlight=False)
    for c in cautions or ():
        console.print(f"[red]caution:[/] {escape(str(c))}", highlight=False)
    if files:
        console.print("written:", highlight=False)
        for f in files:
            console.print(f"  {escape(str(f))}", highlight=False, soft_wrap=True)

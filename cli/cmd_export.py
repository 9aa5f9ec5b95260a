"""``bos export``: fields or a line profile of a result file as CSV."""

from __future__ import annotations

from pathlib import Path
from typing import Optional

import typer

from cli._common import emit_json, handle_errors


def parse_profile_mm(text: str) -> list[list[float]]:
    """``"x0,y0,x1,y1"`` in object-plane mm -> [[x0, y0], [x1, y1]] in metres."""
    from bos.errors import InputError

    try:
        vals = [float(v) for v in text.replace(";", ",").split(",")]
    except ValueError:
        raise InputError(f"--profile must be x0,y0,x1,y1 in mm, got {text!r}") from None
    if len(vals) != 4:
        raise InputError(f"--profile must be four numbers x0,y0,x1,y1 in mm, got {len(vals)}")
    x0, y0, x1, y1 = (v * 1e-3 for v in vals)
    if (x0, y0) == (x1, y1):
        raise InputError("--profile start and end points are the same")
    return [[x0, y0], [x1, y1]]


def refuse_overwriting_input(output: Path, *inputs: Path) -> None:
    """Refuse an output path that is (or links to) one of the inputs: the export would destroy it."""
    import os

    from bos.errors import InputError

    for src in inputs:
        same = Path(output).resolve() == Path(src).resolve()
        if not same and Path(output).exists() and Path(src).exists():
            same = os.path.samefile(output, src)  # hard links too
        if same:
            raise InputError(f"output {output} is the input file {src}; choose another output path")


def _reader_went_away() -> "typer.Exit":
    """Standard output was a pipe whose reader stopped (``bos export ... --csv - | head``): end quietly."""
    import os
    import sys

    try:  # the interpreter's final flush must not fail on the closed pipe either
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
    except (OSError, ValueError, AttributeError):  # not a real file descriptor (e.g. a test runner)
        pass
    return typer.Exit(0)


def _names(variables: Optional[list[str]]) -> Optional[list[str]]:
    if not variables:
        return None
    return [n.strip() for item in variables for n in item.split(",") if n.strip()]


def register(app: typer.Typer) -> None:
    @app.command("export")
    @handle_errors
    def export(
        result: Path = typer.Argument(..., help="result file (.nc) written by bos run"),
        csv: Path = typer.Option(..., "--csv", help="output CSV file ('-' for standard output); "
                                                   "one header line 'name [units]'"),
        variables: Optional[list[str]] = typer.Option(
            None, "--variables", help="variables to export (comma-separated or repeated; default: all fields)"),
        profile: Optional[str] = typer.Option(
            None, "--profile", help="export a line profile instead: x0,y0,x1,y1 in the file's object-plane mm (y up)"),
        as_json: bool = typer.Option(False, "--json", help="print what was written as JSON"),
    ) -> None:
        """Write fields (one row per grid point) or a line profile of a result file as CSV.

        Examples:

          bos export out/plume.nc --csv fields.csv --variables temperature,density

          bos export out/plume.nc --csv - --profile -10,0,10,0 | head
        """
        from bos import store
        from bos.errors import InputError
        from bos.pipeline import PROFILE_FIELDS, sample_profile, write_profile_csv

        to_stdout = str(csv) == "-"
        if to_stdout and as_json:
            raise InputError("--json and --csv - both write to standard output; use one of them")
        if not to_stdout:
            refuse_overwriting_input(csv, result)
        data = store.read_result(result)
        names = _names(variables)
        if names:
            unknown = [n for n in names if n not in data.variables]
            if unknown:
                raise InputError(f"unknown variable(s) {', '.join(unknown)}; have {', '.join(sorted(data.variables))}")
        try:
            if profile is not None:
                line = parse_profile_mm(profile)
                samples = sample_profile(data, line, names=tuple(names or PROFILE_FIELDS))
                if not samples:
                    raise InputError("none of the requested variables is a 2-D field in this result")
                write_profile_csv("-" if to_stdout else csv, samples)
                columns = [store.csv_label(k, units) for k, (_, units) in samples.items()]
            else:
                store.export_csv("-" if to_stdout else csv, data, variables=names)
                columns = store.csv_columns(data, names)
        except BrokenPipeError:
            raise _reader_went_away() from None
        if as_json:
            emit_json({"file": str(csv), "kind": "profile" if profile else "fields", "columns": columns})
        elif not to_stdout:
            typer.echo(f"wrote {csv}")

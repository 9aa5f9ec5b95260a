"""``bos plot``: redraw every figure of a run from its result file alone."""

from __future__ import annotations

from pathlib import Path
from typing import Optional

import typer

from cli._common import choice_type, emit_json, handle_errors, plain

FigureFormat = choice_type("FigureFormat", ("png", "pdf", "svg"))


def check_name(name: str) -> str:
    """A base name for output files: no folder part, not hidden, not empty."""
    from bos.errors import InputError

    if not name or not name.strip() or name.startswith(".") or "/" in name or "\\" in name or "\x00" in name:
        raise InputError(f"--name must be a plain file name (no folder, not empty, not starting with '.'), "
                         f"got {name!r}")
    return name


def profile_arg(text: Optional[str]) -> Optional[list[list[float]]]:
    """``--profile x0,y0,x1,y1`` in object-plane mm with y DOWN (as on the figures) -> metres."""
    if text is None:
        return None
    from cli.cmd_export import parse_profile_mm

    return parse_profile_mm(text)


def register(app: typer.Typer) -> None:
    @app.command("plot")
    @handle_errors
    def plot(
        result: Path = typer.Argument(..., help="result file written by bos run"),
        out: Optional[Path] = typer.Option(None, "--out", "-o",
                                           help="folder for the figures (created if needed) "
                                                "[default: the folder of the result file]"),
        profile: Optional[str] = typer.Option(
            None, "--profile", help="profile line x0,y0,x1,y1 in object-plane mm, y pointing DOWN as on the "
                                    "figures [default: the line stored in the result, else one across the object]"),
        fmt: FigureFormat = typer.Option("png", "--format", help="figure file format"),
        name: Optional[str] = typer.Option(None, "--name",
                                           help="base name of the figure files [default: the run name]"),
        as_json: bool = typer.Option(False, "--json", help="print what was written as JSON"),
    ) -> None:
        """Redraw every figure of a run from its result file alone: displacement, deflection,
        density/temperature, acoustic pressure (sound sources) and the profile along a line.

        Examples:

          bos plot out/plume.nc

          bos plot out/plume.nc --out figures --format pdf

          bos plot out/plume.nc --profile -10,5,10,5 --name plume-row5
        """
        from bos import plots
        from bos.errors import DataFileError

        data = plots.figure_data(result)
        base = check_name(name) if name is not None else data.name
        check_name(base)
        folder = Path(out) if out is not None else Path(result).resolve().parent
        if folder.exists() and not folder.is_dir():
            raise DataFileError(f"--out {folder} is a file, not a folder")
        try:
            folder.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise DataFileError(f"cannot create the folder {folder}: {exc.strerror or exc}") from None
        line = profile_arg(profile)
        if line is None:
            line = plots.profile_line_of(data)
        paths = plots.figure_paths(folder, base, suffix=f".{plain(fmt)}")
        written = plots.write_run_figures(data, paths, line=line)
        axis = data.axis
        if as_json:
            emit_json({"files": [str(p) for p in written], "profile_line_m": line,
                       "symmetry_axis": None if axis is None else {
                           "orientation": axis.orientation, "grid_index": axis.index,
                           "px": axis.px, "m": axis.m}})
            return
        for p in written:
            typer.echo(f"wrote {p}")
        (x0, y0), (x1, y1) = line
        typer.echo(f"profile line: ({x0 * 1e3:.3f}, {y0 * 1e3:.3f}) -> ({x1 * 1e3:.3f}, {y1 * 1e3:.3f}) mm (y down)")
        if axis is not None:
            typer.echo(axis.describe())

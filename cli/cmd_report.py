"""``bos report``: a one-page, self-contained HTML report of a run."""

from __future__ import annotations

from pathlib import Path
from typing import Optional

import typer

from cli._common import emit_json, handle_errors


def register(app: typer.Typer) -> None:
    @app.command("report")
    @handle_errors
    def report(
        result: Path = typer.Argument(..., help="result file written by bos run"),
        out: Optional[Path] = typer.Option(None, "--out", "-o",
                                           help="HTML file to write [default: <result>-report.html beside it]"),
        figures: bool = typer.Option(True, "--figures/--no-figures", help="embed the figures"),
        as_json: bool = typer.Option(False, "--json", help="print what was written as JSON"),
    ) -> None:
        """Write one self-contained HTML page: warnings first, the job summary, the figures,
        rig / medium / processing provenance, input hashes, software version and safety cautions.
        The page loads nothing from outside (figures embedded, inline style, no script).

        Examples:

          bos report out/plume.nc

          bos report out/plume.nc --out plume.html --no-figures
        """
        from bos import report as rep

        target = Path(out) if out is not None else rep.default_report_path(result)
        written = rep.write_report(result, target, figures=figures)
        if as_json:
            emit_json({"file": str(written)})
        else:
            typer.echo(f"wrote {written}")

"""``bos compare``: a BOS result against a calibrated knife-edge result."""

from __future__ import annotations

from pathlib import Path
from typing import Optional

import typer

from cli._common import emit_json, handle_errors, print_notes


def _line(text: str) -> tuple[float, float, float, float]:
    from bos.errors import InputError

    try:
        vals = [float(v) for v in text.replace(";", ",").split(",")]
    except ValueError:
        raise InputError(f"--line must be ROW0,COL0,ROW1,COL1 in knife-picture pixels, got {text!r}") from None
    if len(vals) != 4:
        raise InputError(f"--line must be four numbers ROW0,COL0,ROW1,COL1, got {len(vals)}")
    if vals[:2] == vals[2:]:
        raise InputError("--line start and end points are the same")
    return tuple(vals)  # type: ignore[return-value]


def register(app: typer.Typer) -> None:
    @app.command("compare")
    @handle_errors
    def compare(
        bos_result: Path = typer.Argument(..., help="BOS result file (.nc) from bos run"),
        knife_result: Path = typer.Argument(..., help="knife-edge result file (.nc) from bos knife-edge"),
        control_points: Optional[Path] = typer.Option(
            None, "--control-points",
            help='JSON list of {"bos_px": [row, col], "knife_px": [row, col]} (>= 3); default: automatic registration'),
        out: Optional[Path] = typer.Option(None, "--out", help="output directory for figures, profiles and fields"),
        line: Optional[list[str]] = typer.Option(
            None, "--line", help="profile line ROW0,COL0,ROW1,COL1 in knife-picture pixels (repeatable)"),
        name: str = typer.Option("compare", "--name", help="base name of the output files"),
        as_json: bool = typer.Option(False, "--json", help="print the statistics as JSON"),
    ) -> None:
        """Register a BOS result onto a knife-edge result and compare the deflection normal to the knife."""
        from bos import store
        from bos.schlieren.comparison import compare_results, read_control_points, write_comparison
        from cli.cmd_knife_edge import knife_edge_cautions, print_cautions

        cps = read_control_points(control_points) if control_points is not None else None
        lines = [_line(t) for t in line] if line else None
        bos_data = store.read_result(bos_result)
        knife_data = store.read_result(knife_result)
        comp = compare_results(bos_data, knife_data, control_points=cps)
        files = write_comparison(comp, out, name=name, lines_px=lines) if out is not None else []
        if as_json:
            emit_json(comp.stats())
            return
        from rich.console import Console
        from rich.table import Table

        st = comp.stats()
        tr = comp.transform.as_dict()
        console = Console()
        t = Table(title="bos compare (difference = knife edge - BOS)", header_style="bold")
        for col in ("quantity", "value", "unit"):
            t.add_column(col)
        t.add_row("registration", comp.registration, "")
        t.add_row("scale (knife px per BOS px)", f"{tr['scale']:.5g}", "")
        t.add_row("roll", f"{tr['rotation_deg']:.3f}", "deg")
        t.add_row("shift (x, y)", f"{tr['shift_x_px']:.2f}, {tr['shift_y_px']:.2f}", "knife px")
        t.add_row("registration residual", f"{st['registration_residual_px']:.3g}", "knife px")
        t.add_row("overlap", f"{100 * st['overlap_fraction']:.1f}", "%")
        t.add_row("correlation", f"{st['correlation']:.4f}", "")
        t.add_row("rms difference", f"{st['rms_difference_rad']:.4g}", "rad")
        t.add_row("bias", f"{st['bias_rad']:.4g}", "rad")
        console.print(t)
        print_notes(console, warnings=comp.warnings, files=files)
        print_cautions(knife_edge_cautions(None))

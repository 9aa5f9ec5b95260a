"""``bos inspect``: summary of a result file."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import typer

from cli._common import emit_json, handle_errors


def describe(path: Path) -> dict[str, Any]:
    """JSON-ready description of a result file: summary, variables, provenance."""
    from bos import store
    from bos.pipeline import jsonable

    data = store.read_result(path)
    variables = {}
    for name, var in {**data.coords, **data.variables}.items():
        arr = np.asarray(var.data)
        entry: dict[str, Any] = {"dims": list(var.dims), "shape": list(arr.shape),
                                 "units": store.display_units(var.attrs) or None,
                                 "long_name": var.attrs.get("long_name")}
        if arr.dtype == bool:
            entry["true_fraction"] = float(arr.mean()) if arr.size else 0.0
        elif arr.dtype.kind in "fiu" and arr.size:
            finite = arr[np.isfinite(arr)]
            entry["min"] = float(finite.min()) if finite.size else None
            entry["max"] = float(finite.max()) if finite.size else None
        variables[name] = entry
    attrs = data.attrs
    keep = ("software", "software_version", "experiment_file", "inputs", "input_sha256", "rig", "medium",
            "processing", "reconstruction", "cautions", "coordinate_note", "history", "source", "references",
            "profile_line_m")
    from bos._io import check_output_set

    return jsonable({
        "file": str(path),
        "run_id": attrs.get("run_id"),
        "file_set_warnings": check_output_set(path, attrs.get("run_id")),
        "summary": attrs.get("summary", {}),
        "variables": variables,
        "attributes": {k: attrs[k] for k in keep if k in attrs},
    })


def register(app: typer.Typer) -> None:
    @app.command("inspect")
    @handle_errors
    def inspect(
        result: Path = typer.Argument(..., help="result file (.nc) written by bos run"),
        as_json: bool = typer.Option(False, "--json", help="print the description as JSON"),
    ) -> None:
        """Summarise a result file: headline numbers, variables with units, provenance."""
        info = describe(result)
        if as_json:
            emit_json(info)
            return
        from rich.console import Console
        from rich.table import Table

        from cli.cmd_run import print_summary

        print_summary(info["summary"], title=f"{result}")
        for w in info["file_set_warnings"]:
            typer.secho(f"warning: {w}", fg=typer.colors.YELLOW, err=True)
        table = Table(title="variables", header_style="bold")
        for col in ("name", "shape", "units", "min", "max"):
            table.add_column(col, no_wrap=True)
        for name, v in info["variables"].items():
            lo, hi = v.get("min"), v.get("max")
            shape, units = "x".join(str(s) for s in v["shape"]), str(v["units"])
            if "true_fraction" in v:
                table.add_row(name, shape, units, f"{100 * v['true_fraction']:.1f} % set", "(flag)")
                continue
            table.add_row(name, shape, units, "-" if lo is None else f"{lo:.6g}", "-" if hi is None else f"{hi:.6g}")
        console = Console()
        console.print(table)
        a = info["attributes"]
        console.print(f"software: bos-toolkit {a.get('software_version', '?')}", highlight=False, markup=False)
        for k, v in (a.get("inputs") or {}).items():
            console.print(f"{k}: {v}  sha256 {(a.get('input_sha256') or {}).get(k, '?')[:16]}…", highlight=False, markup=False)
        if a.get("coordinate_note"):
            console.print(f"coordinates: {a['coordinate_note']}", highlight=False, markup=False)

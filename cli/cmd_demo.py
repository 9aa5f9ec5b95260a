"""``bos demo``: the whole job on the bundled demo data, compared with the known truth."""

from __future__ import annotations

from pathlib import Path
from typing import Any, Optional

import numpy as np
import typer

from cli._common import emit_json, handle_errors

SCENES = ("plume", "plate")


def demo_data_dir() -> Path:
    """Directory holding the bundled demo scenes.

    The scenes are package data (``bos/data/demo``, written by
    ``datasets/make_demo.py``), so editable and regular installs find them
    from any working directory.
    """
    import bos
    from bos.errors import DataFileError

    pkg = Path(bos.__file__).resolve().parent
    cand = pkg / "data" / "demo"
    if (cand / "plume" / "experiment.toml").is_file():
        return cand
    raise DataFileError(f"demo data not found in {cand}: reinstall the package (pip install bos-toolkit)")


def compare_with_truth(result, truth_path: Path) -> dict[str, Any]:
    """Recovered vs true temperature of a demo run.

    The truth (``truth.npz`` from ``datasets/make_demo.py``) is interpolated
    bilinearly to the vector grid; statistics use the valid vectors only.
    """
    from scipy.interpolate import RegularGridInterpolator

    with np.load(truth_path) as t:
        tk, ty, tx, t0 = t["temperature_k"].astype(float), t["y_m"], t["x_m"], float(t["ambient_temperature_k"])
    yy, xx = np.meshgrid(result.y_m, result.x_m, indexing="ij")
    true = RegularGridInterpolator((ty, tx), tk, bounds_error=False, fill_value=np.nan)(
        np.column_stack([yy.ravel(), xx.ravel()])).reshape(yy.shape)
    rec = np.asarray(result.density.temperature, float)
    ok = np.isfinite(rec) & np.isfinite(true)
    err = rec[ok] - true[ok]
    return {
        "true_peak_rise_k": float(np.nanmax(true) - t0),
        "recovered_peak_rise_k": float(rec[ok].max() - t0) if ok.any() else float("nan"),
        "rms_error_k": float(np.sqrt(np.mean(err ** 2))) if err.size else float("nan"),
        "median_abs_error_k": float(np.median(np.abs(err))) if err.size else float("nan"),
        "compared_points": int(ok.sum()),
    }


def run_demo(out_dir: Path, *, data_dir: Path, scenes=SCENES, quiet: bool = False) -> list[dict[str, Any]]:
    """Run each demo scene into ``out_dir/<scene>`` and compare with its truth."""
    from bos.config import load_experiment
    from cli.cmd_run import run_and_save

    reports = []
    for scene in scenes:
        exp_file = data_dir / scene / "experiment.toml"
        exp = load_experiment(exp_file, overrides={"output.directory": str((out_dir / scene).resolve())})
        result, files = run_and_save(exp, quiet=quiet)
        truth = data_dir / scene / "truth.npz"
        check = compare_with_truth(result, truth) if truth.is_file() and result.density is not None else {}
        reports.append({"scene": scene, "experiment": str(exp_file), "result": str(files[0]),
                        "files": [str(f) for f in files], "summary": result.summary,
                        "cautions": result.attrs.get("cautions", []), "truth_check": check})
    return reports


def register(app: typer.Typer) -> None:
    @app.command("demo")
    @handle_errors
    def demo(
        out_dir: Path = typer.Argument(Path("bos-demo-output"), help="where to write the results"),
        scene: Optional[list[str]] = typer.Option(None, "--scene", help="plume and/or plate (default: both)"),
        data: Optional[Path] = typer.Option(None, "--data", help="demo data directory (default: the bundled one)"),
        as_json: bool = typer.Option(False, "--json", help="print the reports as JSON"),
    ) -> None:
        """Run the whole job on the bundled demo pictures (hot plume, heated plate) and check it against the truth."""
        from bos.errors import InputError
        from bos.pipeline import jsonable, prepare_output_dir
        from cli.cmd_run import print_summary

        scenes = tuple(scene or SCENES)
        bad = [s for s in scenes if s not in SCENES]
        if bad:
            raise InputError(f"unknown demo scene {', '.join(bad)}; choose from {', '.join(SCENES)}")
        from bos.errors import DataFileError

        data_dir = data if data is not None else demo_data_dir()
        missing = [s for s in scenes if not (data_dir / s / "experiment.toml").is_file()]
        if missing:  # checked before anything is created, so a bad --data leaves nothing behind
            raise DataFileError(f"demo data not found: {data_dir} has no {', '.join(missing)}/experiment.toml")
        created = not out_dir.exists()
        prepare_output_dir(out_dir)
        try:
            reports = run_demo(out_dir, data_dir=data_dir, scenes=scenes, quiet=as_json)
        except BaseException:
            if created:
                import shutil

                shutil.rmtree(out_dir, ignore_errors=True)
            raise
        if as_json:
            emit_json(jsonable({"output": str(out_dir.resolve()), "scenes": reports}))
            return
        for rep in reports:
            print_summary(dict(rep["summary"], cautions=[]), title=f"demo: {rep['scene']}")
        typer.echo("recovered vs true (truth from datasets/make_demo.py):")
        for rep in reports:
            c = rep["truth_check"]
            if c:
                typer.echo(f"  {rep['scene']}: peak temperature rise recovered {c['recovered_peak_rise_k']:.1f} K, "
                           f"true {c['true_peak_rise_k']:.1f} K; rms error {c['rms_error_k']:.2f} K "
                           f"over {c['compared_points']} vectors")
        for rep in reports:
            typer.echo(f"{rep['scene']} result: {rep['result']}")
        typer.echo(f"demo results in {out_dir.resolve()}")

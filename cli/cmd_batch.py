"""``bos batch``: a sequence of frames -> one series file, in parallel, resumable."""

from __future__ import annotations

import sys
from pathlib import Path
from typing import Optional

import typer

from cli._common import choice_type, emit_json, fail, handle_errors, plain

EXIT_SOME_FAILED = 3
REFERENCE_MODES = ("experiment", "previous")


def _progress_bar(total: int):
    """A rich progress bar (frames, frame rate, ETA) on stderr and its callback."""
    from rich.console import Console
    from rich.progress import (BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn,
                               TimeRemainingColumn)

    progress = Progress(TextColumn("frames"), BarColumn(), MofNCompleteColumn(),
                        TextColumn("{task.fields[rate]}"), TextColumn("{task.fields[failed]}"),
                        TimeElapsedColumn(), TextColumn("ETA"), TimeRemainingColumn(),
                        console=Console(stderr=True), transient=True)
    task = progress.add_task("frames", total=total, rate="", failed="")
    state = {"failed": 0, "start": None, "base": 0}

    def callback(finished: int, n: int, outcome) -> None:
        import time

        from bos.batch import STATUS_FAILED

        if outcome is None:  # frames taken over from an earlier run: not part of the rate
            state["base"] = finished
            progress.update(task, completed=finished)
            return
        if state["start"] is None:
            state["start"] = time.perf_counter() - outcome.seconds
        if outcome.status == STATUS_FAILED:
            state["failed"] += 1
        elapsed = time.perf_counter() - state["start"]
        rate = (finished - state["base"]) / elapsed if elapsed > 0 else 0.0
        progress.update(task, completed=finished, rate=f"{rate:.2f} frames/s",
                        failed=f"{state['failed']} failed" if state["failed"] else "")

    return progress, callback


def register(app: typer.Typer) -> None:
    @app.command("batch")
    @handle_errors
    def batch(
        experiment: Path = typer.Argument(..., help="experiment TOML file (settings shared by every frame)"),
        frames: str = typer.Option(..., "--frames",
                                   help="frames: a quoted glob, a folder, a text file listing one image per "
                                        "line, or a video / multi-page TIFF"),
        workers: Optional[int] = typer.Option(None, "--workers", help="local worker processes (default: cores)"),
        scheduler: Optional[str] = typer.Option(None, "--scheduler",
                                                help="address of a running Dask scheduler (tcp://host:8786)"),
        frame_range: Optional[str] = typer.Option(None, "--range",
                                                  help="START:STOP[:STEP] of the ordered frames (0-based, "
                                                       "STOP excluded)"),
        reference: choice_type("ReferenceMode", REFERENCE_MODES) = typer.Option(
            "experiment", "--reference",
            help="experiment (its reference image) or previous (each frame against the one before)"),
        reference_frames: Optional[str] = typer.Option(None, "--reference-frames",
                                                       help="no-flow frames averaged into the reference "
                                                            "(glob, folder, list file or video)"),
        frame_rate_hz: Optional[float] = typer.Option(None, "--frame-rate-hz",
                                                      help="capture frame rate for the frame times (Hz)"),
        restart: bool = typer.Option(False, "--restart",
                                     help="discard the finished frames of an earlier run with other settings"),
        as_json: bool = typer.Option(False, "--json", help="print the outcome as one JSON object"),
    ) -> None:
        """Process a sequence of frames: every frame through the `bos run` stages -> one series file."""
        from bos.batch import batch_paths, run_batch
        from bos.config import load_experiment
        from bos.errors import DataFileError
        from bos.frames import parse_range, resolve_frames

        if not experiment.is_file():
            raise DataFileError(f"experiment file not found: {experiment}")
        reference = plain(reference)
        exp = load_experiment(experiment)
        selected = resolve_frames(frames, frame_range=parse_range(frame_range), frame_rate_hz=frame_rate_hz)
        ref_set = resolve_frames(reference_frames) if reference_frames else None
        show_bar = not as_json and sys.stderr.isatty()
        kwargs = dict(reference=reference, reference_frames=ref_set, workers=workers, scheduler=scheduler,
                      restart=restart)
        try:
            if show_bar:
                bar, callback = _progress_bar(len(selected.frames))
                with bar:
                    report = run_batch(exp, selected, progress=callback, **kwargs)
            else:
                report = run_batch(exp, selected, **kwargs)
        except KeyboardInterrupt:
            parts = batch_paths(exp)["parts"]
            done = len(list(parts.glob("frame-*.npz"))) if parts.is_dir() else 0
            raise fail(f"interrupted: {done} of {len(selected.frames)} frames are finished and kept; "
                       "run the same command again to continue", code=130) from None
        if as_json:
            emit_json({
                "series_file": str(report.series_file),
                "frames": report.frames,
                "done": report.done,
                "failed": [{"frame": i, "error": e} for i, e in report.failed],
                "reference_frames": report.reference_frames,
                "frames_table": str(report.table_file),
                "computed": report.computed,
                "seconds": round(report.seconds, 3),
                "executor": report.executor,
            })
        else:
            for i, err in report.failed:
                typer.echo(f"frame {i} failed: {err}", err=True)
            rate = report.frames_per_second
            rate_text = f" ({rate:.2f} frames/s)" if rate == rate else ""
            typer.echo(f"bos batch: {report.frames} frames, {report.done} done, {len(report.failed)} failed, "
                       f"{report.computed} computed now in {report.seconds:.1f} s{rate_text} on "
                       f"{report.executor}; series {report.series_file}; table {report.table_file}")
        if report.failed:
            raise typer.Exit(EXIT_SOME_FAILED)

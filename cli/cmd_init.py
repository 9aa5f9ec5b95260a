"""``bos init``: write a commented experiment-file template, or the JSON Schema of the file.

Both are generated from :data:`bos.config.SCHEMA`, so they always list every
key with its unit, range, default and command-line option.
"""

from __future__ import annotations

import sys
from pathlib import Path
from typing import Optional

import typer

from cli._common import handle_errors

INIT_EPILOG = """\b
Examples:
  bos init                           # writes experiment.toml here
  bos init rig/plume.toml            # another name; refuses to overwrite
  bos init experiment.toml --force   # overwrite an existing file
  bos init - | less                  # template on standard output
  bos init --schema experiment.schema.json   # JSON Schema for editors
  bos init --schema                  # JSON Schema on standard output"""


def _write_text(path: Path, text: str, *, force: bool) -> None:
    from bos._io import atomic_path
    from bos.errors import DataFileError

    if path.exists() and not force:
        raise DataFileError(f"{path} exists; use --force to overwrite it")
    if path.exists() and path.is_dir():
        raise DataFileError(f"{path} is a directory")
    if not path.parent.is_dir():
        raise DataFileError(f"output directory does not exist: {path.parent}")
    with atomic_path(path) as tmp:
        Path(tmp).write_text(text, encoding="utf-8")


def register(app: typer.Typer) -> None:
    @app.command("init", epilog=INIT_EPILOG)
    @handle_errors
    def init(
        path: Optional[Path] = typer.Argument(
            None, help="file to write ('-' = standard output) [default: experiment.toml; "
                       "with --schema: standard output]"),
        schema: bool = typer.Option(False, "--schema",
                                    help="write the JSON Schema of experiment files instead of a template"),
        force: bool = typer.Option(False, "--force", help="overwrite an existing file"),
    ) -> None:
        """Write a commented experiment-file template (every key, unit, range, default and option)."""
        from bos import __version__, config

        if schema:
            text = config.schema_json_text()
            target = path
        else:
            text = config.template_toml(header=f"written by bos init (bos-toolkit {__version__})")
            target = path if path is not None else Path("experiment.toml")
        if target is None or str(target) == "-":
            sys.stdout.write(text)
            return
        _write_text(target, text, force=force)
        what = "JSON Schema" if schema else "experiment template"
        typer.echo(f"wrote {what}: {target}", err=True)

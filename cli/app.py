"""Entry point of the ``bos`` command.

Commands live in ``cli/cmd_<name>.py`` modules; each defines
``register(app: typer.Typer) -> None``.  They are discovered here, so new
commands never need to edit this file.
"""

from __future__ import annotations

import importlib
import inspect
import pkgutil

import typer
from typer.core import TyperGroup
from typer.models import OptionInfo

import cli


def _is_usage_error(exc: BaseException) -> bool:
    # by name: typer vendors its own copy of click, so the class object depends on the typer version
    return any(c.__name__ == "UsageError" for c in type(exc).__mro__)


class _OneLineErrors(TyperGroup):
    """Command group whose option-parsing errors are one line on stderr (exit 2), like every other error."""

    def invoke(self, ctx):  # noqa: ANN001, ANN201 - signature of the base class
        try:
            return super().invoke(ctx)
        except Exception as exc:  # noqa: BLE001 - re-raised unless it is a usage error
            if not _is_usage_error(exc):
                raise
            where = getattr(getattr(exc, "ctx", None), "command_path", None) or ctx.command_path
            message = " ".join(str(exc.format_message()).split())
            typer.echo(f"error: {message} (see '{where} -h')", err=True)
            raise typer.Exit(2) from None


app = typer.Typer(
    name="bos",
    cls=_OneLineErrors,
    help="Quantitative background-oriented schlieren: plan a rig, process photo pairs, "
    "reconstruct density, temperature and sound pressure.",
    no_args_is_help=True,
    add_completion=True,
    pretty_exceptions_enable=False,
    # plain click help: boolean options read as flags (--json, --figures/--no-figures), units in [brackets]
    rich_markup_mode=None,
    context_settings={"help_option_names": ["-h", "--help"], "max_content_width": 100},
)

_LOADED = False


def _load_commands() -> None:
    global _LOADED
    if _LOADED:
        return
    for info in sorted(pkgutil.iter_modules(cli.__path__), key=lambda m: m.name):
        if info.name.startswith("cmd_"):
            module = importlib.import_module(f"cli.{info.name}")
            module.register(app)
    _add_aliases()
    _LOADED = True


def _add_aliases() -> None:
    """Give every command the same short aliases for the rig options (``cli._common.ALIASES``).

    A command that declares ``--focal-length-mm`` also accepts ``--focal-mm``,
    and so on, unless it already uses that spelling for something else; so a
    command written without the aliases still follows the convention.
    """
    from bos.config import option_name
    from cli._common import ALIASES

    wanted = {option_name(key): aliases for key, aliases in ALIASES.items()}
    for command in app.registered_commands:
        params = list(inspect.signature(command.callback).parameters.items())
        options = [(name, p.default) for name, p in params if isinstance(p.default, OptionInfo)]
        taken = {d for _, info in options for decl in (info.param_decls or ()) for d in decl.split("/")}
        taken |= {"--" + name.replace("_", "-") for name, info in options if not info.param_decls}
        for name, info in options:
            decls = tuple(info.param_decls or ()) or ("--" + name.replace("_", "-"),)
            extra = [a for d in decls for a in wanted.get(d, ()) if a not in taken]
            if extra:
                info.param_decls = (*decls, *extra)
                taken.update(extra)


def _version_callback(value: bool) -> None:
    if value:
        from bos import __version__

        typer.echo(f"bos {__version__}")
        raise typer.Exit()


@app.callback()
def _root(
    version: bool = typer.Option(False, "--version", "-V", callback=_version_callback, is_eager=True,
                                 help="print the version and exit"),
) -> None:
    """Quantitative background-oriented schlieren toolkit.

    Start with `bos init` (experiment-file template), `bos plan` (rig), `bos synth` (test pair)
    or `bos demo`; every command has -h/--help with examples.
    """


def get_app() -> typer.Typer:
    """Return the fully populated typer app (for tests: ``CliRunner().invoke(get_app(), ...)``)."""
    _load_commands()
    return app


def _sigterm_as_interrupt() -> None:
    """SIGTERM cleans up like Ctrl-C: staged output is discarded, earlier results stay."""
    import signal

    def handler(signum, frame):  # noqa: ARG001
        raise KeyboardInterrupt

    try:
        signal.signal(signal.SIGTERM, handler)
    except ValueError:  # not the main thread (embedded use)
        pass


def main() -> None:
    _sigterm_as_interrupt()
    try:
        get_app()()
    except SystemExit as exc:
        if exc.code == 130:
            # interrupted: the command has already cleaned up (staged output discarded, workers
            # stopped); leave without the interpreter's exit handlers, which join the threads of
            # a stopped process pool and could wait on it (a Ctrl-C of `bos batch` that did not
            # return within 60 s was seen once in the test suite)
            import os
            import sys

            for stream in (sys.stdout, sys.stderr):
                try:
                    stream.flush()
                except (OSError, ValueError):
                    pass
            os._exit(130)
        raise


if __name__ == "__main__":  # pragma: no cover
    main()

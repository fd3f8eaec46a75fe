"""The ``timbrel`` command line: a thin typer layer over the library.

Each command parses its options and calls one library function. The package's own
errors (:class:`timbrel.TimbrelError`) are caught once, in :func:`main`, and printed
as one line; anything else is a bug and keeps its traceback.

Exit codes: 0 success; 1 a timbrel error (bad input, bad config, damaged file);
2 a usage error (unknown option, out-of-range value); 3 with ``--strict``, some input
files could not be used (the work on every other file is kept).
"""

from __future__ import annotations

import sys
from pathlib import Path
from typing import Annotated

import typer
from typer.core import TyperGroup

from . import __version__
from ._errors import TimbrelError

EXIT_ERROR = 1
EXIT_FAILED_FILES = 3

class _Commands(TyperGroup):
    """Catches the package's own errors, once, for every command."""

    def invoke(self, ctx):  # type: ignore[no-untyped-def]
        try:
            return super().invoke(ctx)
        except TimbrelError as exc:
            _err(f"timbrel: error: {exc}")
            ctx.exit(EXIT_ERROR)


app = typer.Typer(
    cls=_Commands,
    name="timbrel",
    help="Learn per-frame features from sound: log-mel frames, an RBM, Parquet output.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
)


def _version(value: bool) -> None:
    if value:
        typer.echo(f"timbrel {__version__}")
        raise typer.Exit()


@app.callback()
def _root(
    version: Annotated[bool, typer.Option("--version", callback=_version, is_eager=True,
                                          help="Print the version and exit.")] = False,
) -> None:
    """Learn per-frame features from sound."""


ConfigOption = Annotated[Path | None, typer.Option(
    "--config", "-c", exists=True, dir_okay=False, readable=True,
    help="TOML configuration file (default: built-in defaults, as configs/default.toml).")]
SetOption = Annotated[list[str] | None, typer.Option(
    "--set", "-s", metavar="TABLE.KEY=VALUE",
    help="Override one configuration key, e.g. --set frontend.n_mels=64. Repeatable.")]
WorkersOption = Annotated[int | None, typer.Option(
    "--workers", "-j", min=1, help="Worker processes (default: one per CPU core).")]
StrictOption = Annotated[bool, typer.Option(
    "--strict", help=f"Exit with code {EXIT_FAILED_FILES} if any input file could not be used.")]
QuietOption = Annotated[bool, typer.Option("--quiet", "-q", help="No progress bar.")]


def _err(text: str) -> None:
    typer.echo(text, err=True)


@app.command("frames")
def frames_command(
    source: Annotated[Path, typer.Argument(help="Folder of audio files, or a manifest CSV.")],
    out: Annotated[Path, typer.Option("--out", "-o", help="Frame cache folder to write.")],
    config: ConfigOption = None,
    overrides: SetOption = None,
    workers: WorkersOption = None,
    allow_outside: Annotated[bool, typer.Option(
        "--allow-outside", help="Accept manifest paths outside the manifest's folder.")] = False,
    strict: StrictOption = False,
    quiet: QuietOption = False,
) -> None:
    """Compute log-mel frames of every clip once, into a reusable cache."""
    from .cache import build_cache
    from .config import load_config

    cfg = load_config(config, overrides=overrides or ())
    summary = build_cache(source, out, config=cfg, workers=workers, allow_outside=allow_outside,
                          progress=not quiet)
    for failure in summary.failures:
        _err(f"failed: {failure.source}: {failure.reason}")
    typer.echo(summary.line())
    typer.echo(f"cache: {summary.path}")
    if strict and summary.failures:
        raise typer.Exit(EXIT_FAILED_FILES)


def main(argv: list[str] | None = None) -> int:
    """Run the command line; return the exit code."""
    try:
        app(args=argv, prog_name="timbrel")
    except SystemExit as exc:
        return exc.code if isinstance(exc.code, int) else (0 if exc.code is None else 1)
    return 0


def run() -> None:
    """Console-script entry point."""
    sys.exit(main())

"""The ``timbrel`` command line: a thin typer layer over the library.

Each command parses its options and calls one library function. The package's own
errors (:class:`timbrel.TimbrelError`) are caught once, in :func:`main`, and printed
as one line; anything else is a bug and keeps its traceback.

Exit codes: 0 success; 1 a timbrel error (bad input, bad config, damaged file);
2 a usage error (unknown option, out-of-range value); 3 with ``--strict``, some input
files could not be used (the work on every other file is kept); 130 stopped by Ctrl-C
(SIGINT), 143 stopped by SIGTERM (128 + the signal's number, as shells report it), after
one line saying what the run kept.
"""

from __future__ import annotations

import signal
import sys
import threading
from enum import Enum
from pathlib import Path
from typing import Annotated

import typer
from typer.core import TyperGroup

from . import __version__
from ._errors import ParameterError, TimbrelError

EXIT_ERROR = 1
EXIT_FAILED_FILES = 3
EXIT_SIGNAL = 128  # + the signal's number


class _Commands(TyperGroup):
    """Catches the package's own errors, once, for every command, and SIGINT/SIGTERM.

    SIGTERM is turned into the same ``KeyboardInterrupt`` as Ctrl-C, so a stage stops
    its workers and says what it kept (``Interrupted.kept``) either way.
    """

    def invoke(self, ctx):  # type: ignore[no-untyped-def]
        received = [signal.SIGINT]

        def on_sigterm(signum, frame):  # type: ignore[no-untyped-def]
            received[0] = signal.SIGTERM
            raise KeyboardInterrupt

        main_thread = threading.current_thread() is threading.main_thread()
        previous = signal.signal(signal.SIGTERM, on_sigterm) if main_thread else None
        try:
            return super().invoke(ctx)
        except TimbrelError as exc:
            _err(f"timbrel: error: {exc}")
            ctx.exit(EXIT_ERROR)
        except KeyboardInterrupt as exc:
            kept = getattr(exc, "kept", "")
            _err(f"timbrel: stopped by {received[0].name}" + (f": {kept}" if kept else ""))
            ctx.exit(EXIT_SIGNAL + received[0])
        finally:
            if main_thread:
                signal.signal(signal.SIGTERM, signal.SIG_DFL if previous is None else previous)


app = typer.Typer(
    cls=_Commands,
    name="timbrel",
    help="Learn per-frame features from sound: log-mel frames, an RBM, Parquet output.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
    # click's plain help: rendering it with rich imports and draws about 0.2 s of
    # panels before the first line appears (bench/bench_startup.py)
    rich_markup_mode=None,
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


SchedulerOption = Annotated[str | None, typer.Option(
    "--scheduler", help="Dask scheduler address, tcp://HOST:PORT (needs the dask extra).")]
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
    source: Annotated[str, typer.Argument(
        help="Folder of audio files, or a manifest CSV (a path or a URL such as s3://...).")],
    out: Annotated[str, typer.Option("--out", "-o",
                                     help="Frame cache folder to write (a path or a URL).")],
    config: ConfigOption = None,
    overrides: SetOption = None,
    workers: WorkersOption = None,
    scheduler: SchedulerOption = None,
    allow_outside: Annotated[bool, typer.Option(
        "--allow-outside", help="Accept manifest paths outside the manifest's folder.")] = False,
    strict: StrictOption = False,
    quiet: QuietOption = False,
) -> None:
    """Compute log-mel frames of every clip once, into a reusable cache."""
    from .cache import build_cache
    from .config import load_config

    cfg = load_config(config, overrides=overrides or ())
    summary = build_cache(source, out, config=cfg, workers=workers, scheduler=scheduler,
                          allow_outside=allow_outside, progress=not quiet)
    for failure in summary.failures:
        _err(f"failed: {failure.source}: {failure.reason}")
    typer.echo(summary.line())
    typer.echo(f"cache: {summary.path}")
    if strict and summary.failures:
        raise typer.Exit(EXIT_FAILED_FILES)


class Units(str, Enum):
    """Hidden-unit kinds."""

    relu = "relu"
    binary = "binary"
    stepped = "stepped"


class Columns(str, Enum):
    """How a dataset holds the features: one list column, or one column per unit."""

    vector = "vector"
    wide = "wide"


class Layer(str, Enum):
    """Which layer of a stacked model."""

    top = "top"
    first = "first"
    all = "all"


class Compression(str, Enum):
    """Parquet codecs of an export (see timbrel.export.CODEC_LEVELS)."""

    zstd = "zstd"
    lz4 = "lz4"
    none = "none"


@app.command("fit")
def fit_command(
    cache: Annotated[str, typer.Argument(
        help="Frame cache made by `timbrel frames` (a path or a URL).")],
    out: Annotated[str, typer.Option("--out", "-o",
                                     help="Model file to write (.npz; a path or a URL).")],
    config: ConfigOption = None,
    overrides: SetOption = None,
    n_hidden: Annotated[int | None, typer.Option("--n-hidden", min=1,
                                                 help="Number of hidden units.")] = None,
    hidden: Annotated[Units | None, typer.Option("--hidden", help="Hidden-unit kind.")] = None,
    epochs: Annotated[int | None, typer.Option("--epochs", min=1, help="Training epochs.")] = None,
    seed: Annotated[int | None, typer.Option("--seed", help="Random seed.")] = None,
    on: Annotated[str | None, typer.Option(
        "--on",
        help="A trained model to stack this one on (it learns from that model's features).")
    ] = None,
    resume: Annotated[bool, typer.Option(
        "--resume", help="Continue from MODEL.checkpoint.npz after a crash or stop.")] = False,
    quiet: QuietOption = False,
) -> None:
    """Train an RBM on a frame cache and write one model file."""
    from .config import load_config
    from .training import train

    model = {"n_hidden": n_hidden, "hidden": hidden.value if hidden else None,
             "epochs": epochs, "seed": seed}
    result = train(cache, out, config=load_config(config) if config else None,
                   overrides=overrides or (),
                   model={k: v for k, v in model.items() if v is not None}, on=on,
                   resume=resume, progress=not quiet, log=_err)
    typer.echo(result.line())
    typer.echo(f"model: {result.model_path}")
    typer.echo(f"history: {result.history_path}")


@app.command("inspect")
def inspect_command(
    model: Annotated[str, typer.Argument(help="Model file (a path or a URL).")],
    as_json: Annotated[bool, typer.Option("--json", help="Print the summary as JSON.")] = False,
    plots: Annotated[Path | None, typer.Option(
        "--plots", help="Folder to draw pictures of the model into (PNG).")] = None,
) -> None:
    """Summarise a model file: sizes, unit kinds, sigma per band, training figures."""
    import json

    from .pipeline import describe_text
    from .plots import inspect_model

    summary = inspect_model(model, plots)
    typer.echo(json.dumps(summary, indent=1) if as_json else describe_text(summary))


@app.command("export")
def export_command(
    source: Annotated[str, typer.Argument(
        help="Folder of audio, manifest CSV, or frame cache (a path or a URL).")],
    model: Annotated[str, typer.Option("--model", "-m",
                                       help="Model file from `timbrel fit` (a path or a URL).")],
    out: Annotated[str, typer.Option("--out", "-o",
                                     help="Parquet dataset folder to write (a path or a URL).")],
    workers: WorkersOption = None,
    scheduler: SchedulerOption = None,
    columns: Annotated[Columns, typer.Option(
        "--columns", help="vector: one features list column; wide: one column per unit.")
    ] = Columns.vector,
    layer: Annotated[Layer, typer.Option(
        "--layer", help="A stacked model's layer: top, first, or all side by side.")
    ] = Layer.top,
    events: Annotated[str | None, typer.Option(
        "--events",
        help="Annotation table (file onset offset label), a path or URL: adds each frame's "
        "event labels.")
    ] = None,
    pool: Annotated[str, typer.Option(
        "--pool", help="Also write a clip table with these poolings, e.g. mean,max,std.")] = "",
    compression: Annotated[Compression, typer.Option(
        "--compression", help="Parquet codec: zstd (half the size), lz4, or none (fastest).")
    ] = Compression.zstd,
    overwrite: Annotated[bool, typer.Option(
        "--overwrite", help="Replace whatever the output folder holds.")] = False,
    config: ConfigOption = None,
    allow_outside: Annotated[bool, typer.Option(
        "--allow-outside", help="Accept manifest paths outside the manifest's folder.")] = False,
    strict: StrictOption = False,
    quiet: QuietOption = False,
) -> None:
    """Write every frame's hidden activations to a Parquet dataset."""
    from .config import load_config
    from .export import export

    cfg = load_config(config) if config else None
    pools = [p.strip() for p in pool.split(",") if p.strip()]
    summary = export(source, model, out, workers=workers, scheduler=scheduler,
                     columns=columns.value, pool=pools, compression=compression.value,
                     layer=layer.value, events=events, overwrite=overwrite, config=cfg,
                     allow_outside=allow_outside, progress=not quiet)
    for src, reason in summary.failures:
        _err(f"failed: {src}: {reason}")
    for problem in summary.event_problems:
        _err(f"events: {problem}")
    typer.echo(summary.line())
    typer.echo(f"dataset: {summary.path}")
    if strict and summary.failures:
        raise typer.Exit(EXIT_FAILED_FILES)


@app.command("probe")
def probe_command(
    dataset: Annotated[str, typer.Argument(
        help="Dataset folder from `timbrel export` (a path or a URL).")],
    label: Annotated[str, typer.Option("--label", "-l", help="Column with each clip's class.")
                     ] = "label",
    split_column: Annotated[str, typer.Option(
        "--split-column", help="Column with train/test per clip; if absent, k-fold over clips.")
    ] = "split",
    baseline: Annotated[str, typer.Option(
        "--baseline", help="Peers to compare: mfcc,logmel,kmeans (empty for none; with "
        "--events: mfcc,logmel).")
    ] = "mfcc,logmel,kmeans",
    # evaluation.PROBE_POOLS, spelled out so that --help need not import the stage
    pool: Annotated[str, typer.Option(
        "--pool", help="Pooling of frame features per clip: max, mean, std, comma-separated.")
    ] = "max",
    folds: Annotated[int, typer.Option("--folds", min=2, help="Folds without a split column.")
                     ] = 5,
    audio_root: Annotated[str | None, typer.Option(
        "--audio-root", help="Where the clips' audio lives, a path or a URL (default: as "
        "recorded at export).")
    ] = None,
    choose_by: Annotated[str | None, typer.Option(
        "--choose-by", help="Column naming each clip's origin (speaker, sound set, site): "
        "every feature set's pooling and C are then chosen by cross-validation over the "
        "training clips' origins, and --pool is not used.")
    ] = None,
    as_json: Annotated[bool, typer.Option("--json", help="Print the result as JSON.")] = False,
    events: Annotated[bool, typer.Option(
        "--events", help="Probe frames instead of clips: detect the exported events (export "
        "--events) and score them in 1 s segments.")] = False,
) -> None:
    """Do the features beat simple ones? A probe classifier beside MFCC, log-mel and k-means."""
    import json

    if events:
        from .detection import probe_events

        if choose_by:
            raise ParameterError("--choose-by chooses how clips are pooled; it does not "
                                 "apply with --events")

        # the k-means peer codes clips, not frames: a frame probe compares MFCC and log-mel
        peers = [b.strip() for b in baseline.split(",") if b.strip() and b.strip() != "kmeans"]
        found = probe_events(dataset, split_column=split_column or "split", baselines=peers,
                             audio_root=audio_root)
        typer.echo(json.dumps(found.to_dict(), indent=1) if as_json else found.table())
        return
    from .evaluation import probe

    result = probe(dataset, label=label, split_column=split_column or None,
                   baselines=[b.strip() for b in baseline.split(",") if b.strip()],
                   pools=[p.strip() for p in pool.split(",") if p.strip()], folds=folds,
                   audio_root=audio_root, choose_by=choose_by or None)
    typer.echo(json.dumps(result.to_dict(), indent=1) if as_json else result.table())


@app.command("score")
def score_command(
    model: Annotated[str, typer.Argument(help="Model file from `timbrel fit` (a path or a URL).")],
    cache: Annotated[str, typer.Argument(
        help="Frame cache to score, e.g. the training one (a path or a URL).")],
    chains: Annotated[int, typer.Option("--chains", min=2,
                                        help="AIS chains (independent runs).")] = 100,
    temperatures: Annotated[int, typer.Option(
        "--temperatures", min=1, help="AIS intermediate distributions.")] = 1000,
    seed: Annotated[int, typer.Option("--seed", min=0, help="Seed of the AIS chains.")] = 0,
    max_windows: Annotated[int, typer.Option(
        "--max-windows", min=0,
        help="Context windows (one per frame) scored per set at most, drawn evenly; 0 = all.")
    ] = 0,
    as_json: Annotated[bool, typer.Option("--json", help="Print the result as JSON.")] = False,
    quiet: QuietOption = False,
) -> None:
    """Average log-likelihood per frame: log Z by AIS (exact for <= 20 binary hiddens)."""
    import json

    from .likelihood import score

    result = score(model, cache, n_chains=chains, n_temperatures=temperatures, seed=seed,
                   max_windows=max_windows, progress=not quiet and not as_json)
    typer.echo(json.dumps(result.to_dict(), indent=1) if as_json else result.table())


class Encoding(str, Enum):
    """Raw PCM sample formats (little-endian)."""

    s16 = "s16"
    s32 = "s32"
    f32 = "f32"


@app.command("stream")
def stream_command(
    source: Annotated[str, typer.Argument(help="'-' for standard input (raw PCM).")],
    model: Annotated[Path, typer.Option("--model", "-m", help="Model file from `timbrel fit`.")],
    rate: Annotated[int, typer.Option("--rate", "-r", min=1, help="Sample rate of the PCM, Hz.")],
    channels: Annotated[int, typer.Option("--channels", min=1, help="Interleaved channels.")
                        ] = 1,
    encoding: Annotated[Encoding, typer.Option(
        "--encoding", help="Samples: s16 or s32 (signed integers) or f32 (floats).")
    ] = Encoding.s16,
    block_ms: Annotated[float, typer.Option(
        "--block-ms", min=0.1, help="Audio read per step, milliseconds.")] = 10.0,
) -> None:
    """Features of live raw PCM on standard input, as an Arrow IPC stream on standard output."""
    if source != "-":
        raise typer.BadParameter("only '-' (standard input) is read", param_hint="SOURCE")
    from .extractor import stream_pcm

    n = stream_pcm(model, sys.stdin.buffer, sys.stdout.buffer, rate=rate, channels=channels,
                   encoding=encoding.value, block_seconds=block_ms / 1000.0)
    _err(f"{n} frames")


@app.command("show")
def show_command(
    audio: Annotated[Path, typer.Argument(help="Audio file to draw.")],
    model: Annotated[Path, typer.Option("--model", "-m", help="Model file from `timbrel fit`.")],
    out: Annotated[Path, typer.Option("--out", "-o", help="PNG file to write.")],
) -> None:
    """Draw a clip's log-mel spectrogram above its hidden activations over time."""
    from .plots import draw_clip

    typer.echo(f"picture: {draw_clip(audio, model, out)}")


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

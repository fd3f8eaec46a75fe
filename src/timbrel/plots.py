# ruff: noqa: RUF001  (labels and docstrings use math notation: σ, −, ×)
"""Pictures of what a model learned and of how it hears one clip.

:func:`draw_model` writes three PNGs about a model file (receptive fields, σ per band,
training curves); :func:`draw_clip` writes one PNG of a clip's log-mel spectrogram above
its hidden activations. The small pure functions the pictures rest on
(:func:`band_centres`, :func:`band_position`, :func:`receptive_field`,
:func:`order_units`) are public so they can be checked without drawing.

matplotlib is imported only inside the drawing functions, so ``import timbrel.plots``
stays light and matplotlib is needed only to draw (the ``plot`` extra). Figures are made
with :class:`matplotlib.figure.Figure` on an Agg canvas, never through ``pyplot``: no
global backend is switched and no figure is registered anywhere, so nothing stays open
after a function returns.
"""

from __future__ import annotations

import math
import os
from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from ._atomic import atomic_path
from ._errors import ParameterError
from .frontend import hz_to_mel, mel_band_edges

if TYPE_CHECKING:
    from matplotlib.axes import Axes
    from matplotlib.figure import Figure

    from .config import FrontEndConfig
    from .pipeline import FeaturePipeline

__all__ = [
    "CLIP_FIGSIZE",
    "CURVES_FIGSIZE",
    "PLOT_EXTRA_MESSAGE",
    "RECEPTIVE_FIELDS_FILE",
    "SIGMA_FIGSIZE",
    "SIGMA_FILE",
    "TRAINING_CURVES_FILE",
    "UNIT_ORDERS",
    "band_centres",
    "band_position",
    "draw_clip",
    "draw_model",
    "inspect_model",
    "order_units",
    "receptive_field",
    "receptive_fields_figsize",
]

PLOT_EXTRA_MESSAGE = "pictures need the plot extra: pip install 'timbrel[plot]'"

RECEPTIVE_FIELDS_FILE = "receptive_fields.png"
SIGMA_FILE = "sigma_per_band.png"
TRAINING_CURVES_FILE = "training_curves.png"

#: Figure sizes in inches; a PNG is ``int(figsize * dpi)`` pixels (no tight cropping).
SIGMA_FIGSIZE = (8.0, 4.5)
CURVES_FIGSIZE = (12.0, 7.0)
CLIP_FIGSIZE = (11.0, 7.0)
#: One receptive-field panel, and the margin around the grid (title, labels, colour bar).
_FIELD_CELL = (2.0, 2.0)
_FIELD_MARGIN = (1.5, 1.2)
_FIELD_MIN = (7.5, 4.5)

#: Ways :func:`order_units` can sort hidden units.
UNIT_ORDERS = ("peak_time", "strength")

_DPI_RANGE = (10, 600)
_MAX_UNITS = 100
_ACTIVATION_CMAP = "viridis"
_SPECTROGRAM_CMAP = "magma"
_FIELD_CMAP = "RdBu_r"
#: Hidden activations above this percentile of a clip's values share the top colour.
_ACTIVATION_PERCENTILE = 99.5


# ------------------------------------------------------------------------- pure helpers


def band_centres(frontend: FrontEndConfig) -> np.ndarray:
    """Centre frequency of each mel band of a front end.

    The ``n_mels`` triangular filters have ``n_mels + 2`` edges equally spaced in mels
    from ``fmin`` to the upper frequency; band ``b`` peaks at edge ``b + 1``.

    Parameters
    ----------
    frontend : FrontEndConfig
        Uses ``n_mels``, ``fmin``, ``upper_frequency`` and ``mel_scale``.

    Returns
    -------
    np.ndarray, shape (n_mels,), float64
        Hz, increasing.
    """
    fe = frontend
    return mel_band_edges(n_mels=fe.n_mels, fmin=fe.fmin, fmax=fe.upper_frequency,
                          scale=fe.mel_scale)[1:-1]


def band_position(hz: np.ndarray | float, frontend: FrontEndConfig) -> np.ndarray:
    """Fractional band index of a frequency: ``b`` at the centre of band ``b``.

    Band centres are equally spaced in mels, so a frequency between two centres lands
    between their indices in proportion to its mel distance. Images of bands are drawn
    with band ``b`` at height ``b``; this places Hz ticks on them.

    Parameters
    ----------
    hz : float or np.ndarray
        Frequencies in Hz, ≥ 0.
    frontend : FrontEndConfig

    Returns
    -------
    np.ndarray, same shape as ``hz``, float64
    """
    fe = frontend
    low = hz_to_mel(fe.fmin, scale=fe.mel_scale)
    step = (hz_to_mel(fe.upper_frequency, scale=fe.mel_scale) - low) / (fe.n_mels + 1)
    return (hz_to_mel(hz, scale=fe.mel_scale) - low) / step - 1.0


def receptive_field(
    weights: np.ndarray,
    sigma: np.ndarray,
    layout: tuple[int, int],
    *,
    divide_by_variance: bool = True,
) -> np.ndarray:
    """Each hidden unit's weights as a (context position × mel band) image.

    A Gaussian-visible RBM's hidden unit ``j`` receives
    ``x_j = c_j + Σ_i v_i W_ij / σ_i²`` from a standardised context window ``v``, so
    ``W_ij / σ_i²`` is the filter the unit applies to the window: what it "sees". The
    weights alone, ``W_ij``, are what the unit adds to the visibles' mean when it is on.
    With one σ per band the two differ by a per-band factor; the filter is the default.

    Parameters
    ----------
    weights : np.ndarray, shape (n_visible, n_hidden)
        ``RBM.weights_``; visible index ``position * n_bands + band``.
    sigma : np.ndarray, shape (n_visible,)
        ``RBM.sigma_``, > 0.
    layout : tuple of (int, int)
        ``(n_positions, n_bands)`` with ``n_positions * n_bands == n_visible``.
    divide_by_variance : bool, default True
        True: ``W / σ²`` (the filter). False: ``W`` as stored.

    Returns
    -------
    np.ndarray, shape (n_hidden, n_positions, n_bands), float32
        ``out[j, p, b]`` belongs to band ``b`` at context position ``p`` (0 is the
        earliest frame of the window).

    Raises
    ------
    ParameterError
        If the shapes disagree or σ is not finite and positive.
    """
    weights = np.asarray(weights)
    if weights.ndim != 2:
        raise ParameterError(f"weights must be 2-D (n_visible, n_hidden); got shape "
                             f"{weights.shape}")
    n_visible, n_hidden = weights.shape
    if (len(layout) != 2 or any(int(n) != n or n < 1 for n in layout)
            or layout[0] * layout[1] != n_visible):
        raise ParameterError(f"layout {tuple(layout)} does not describe {n_visible} visible "
                             "units as (n_positions, n_bands)")
    field = weights.astype(np.float32, copy=True)
    if divide_by_variance:
        sigma = np.asarray(sigma, np.float32).reshape(-1)
        if sigma.shape != (n_visible,):
            raise ParameterError(f"sigma must have shape ({n_visible},); got {sigma.shape}")
        if not (np.isfinite(sigma).all() and (sigma > 0).all()):
            raise ParameterError("sigma must be finite and positive")
        field /= np.square(sigma)[:, None]
    return np.ascontiguousarray(field.T.reshape(n_hidden, int(layout[0]), int(layout[1])))


def order_units(
    activations: np.ndarray,
    *,
    by: str = "peak_time",
    strength: np.ndarray | None = None,
) -> np.ndarray:
    """An order of hidden units that makes structure in their activations visible.

    Parameters
    ----------
    activations : np.ndarray, shape (n_frames, n_hidden)
        Hidden activations of one clip.
    by : {"peak_time", "strength"}, default "peak_time"
        ``"peak_time"``: by the frame of each unit's largest activation, earliest first;
        units never above zero come last, strongest first. ``"strength"``: by
        ``strength``, largest first.
    strength : np.ndarray, shape (n_hidden,), optional
        A size per unit (e.g. its filter norm); needed by ``"strength"`` and used to
        order the silent units of ``"peak_time"`` (default there: total activation).

    Returns
    -------
    np.ndarray, shape (n_hidden,), int64
        Unit indices; ``order[0]`` is drawn first (at the bottom).
    """
    activations = np.asarray(activations)
    if activations.ndim != 2:
        raise ParameterError(f"activations must be 2-D (n_frames, n_hidden); got shape "
                             f"{activations.shape}")
    if by not in UNIT_ORDERS:
        raise ParameterError(f"by = {by!r} is not one of {', '.join(UNIT_ORDERS)}")
    n_hidden = activations.shape[1]
    if strength is not None:
        strength = np.asarray(strength, np.float64).reshape(-1)
        if strength.shape != (n_hidden,):
            raise ParameterError(f"strength must have shape ({n_hidden},); got {strength.shape}")
    if by == "strength":
        if strength is None:
            raise ParameterError("by = 'strength' needs a strength per unit")
        return np.argsort(-strength, kind="stable").astype(np.int64)
    if activations.shape[0] == 0:
        return np.arange(n_hidden, dtype=np.int64)
    peak = np.argmax(activations, axis=0)
    silent = activations.max(axis=0) <= 0
    size = strength if strength is not None else activations.sum(axis=0, dtype=np.float64)
    # primary key last in lexsort: silent units after active ones, then peak frame, then size
    return np.lexsort((-size, np.where(silent, 0, peak), silent)).astype(np.int64)


def receptive_fields_figsize(n_shown: int) -> tuple[float, float]:
    """Size in inches of the receptive-field grid for ``n_shown`` panels (≥ 1).

    Panels fill a near-square grid of ``ceil(sqrt(n))`` columns; the figure is at least
    7.5 × 4.5 inches.
    """
    cols, rows = _grid(n_shown)
    # a floor on the size keeps the two title lines and the colour bar label readable
    return (max(cols * _FIELD_CELL[0] + _FIELD_MARGIN[0], _FIELD_MIN[0]),
            max(rows * _FIELD_CELL[1] + _FIELD_MARGIN[1], _FIELD_MIN[1]))


def _grid(n: int) -> tuple[int, int]:
    if n < 1:
        raise ParameterError(f"cannot lay out {n} panels")
    cols = math.ceil(math.sqrt(n))
    return cols, math.ceil(n / cols)


def _hz_ticks(frontend: FrontEndConfig, *, min_gap: float) -> tuple[np.ndarray, list[str]]:
    """Round frequencies inside the band range, at least ``min_gap`` (share of axis) apart."""
    n = frontend.n_mels
    candidates = [m * 10.0 ** e for e in range(1, 6) for m in (1, 2, 5)]
    span = max(n, 1)
    chosen: list[tuple[float, float]] = []
    # from the top down, so the kHz values stay and a low value that would touch one goes
    for hz in sorted(candidates, reverse=True):
        pos = float(band_position(hz, frontend))
        if not -0.5 <= pos <= n - 0.5:
            continue
        if chosen and abs(chosen[-1][1] - pos) < min_gap * span:
            continue
        chosen.append((hz, pos))
    chosen.reverse()
    if len(chosen) < 2:
        # a narrow band range holds at most one round value: label band centres instead
        bands = sorted({0, n // 2, n - 1})
        centres = band_centres(frontend)
        chosen = [(float(f"{centres[b]:.3g}"), float(b)) for b in bands]
    return (np.array([p for _, p in chosen]), [_hz_text(hz) for hz, _ in chosen])


def _hz_text(hz: float) -> str:
    return f"{hz / 1000:g}k" if hz >= 1000 else f"{hz:g}"


def _history_series(history: Sequence[dict[str, Any]], key: str) -> np.ndarray:
    values = []
    for row in history:
        v = row.get(key)
        values.append(float(v) if isinstance(v, (int, float)) else np.nan)  # None: not finite
    return np.asarray(values, np.float64)


# ------------------------------------------------------------------------- matplotlib


def _require_matplotlib() -> None:
    try:
        import matplotlib.backends.backend_agg
        import matplotlib.figure  # noqa: F401
    except ImportError:
        raise ParameterError(PLOT_EXTRA_MESSAGE) from None


def _new_figure(figsize: tuple[float, float], dpi: float) -> Figure:
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=figsize, dpi=dpi, layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def _save(fig: Figure, path: Path, *, title: str) -> Path:
    path = Path(path)
    with atomic_path(path) as tmp:
        # the temporary name ends in ".part", so the format is given, not guessed
        fig.savefig(tmp, format="png", dpi=fig.dpi, metadata={"Title": title})
        # the temporary file is created private (0600); a picture is for sharing
        os.chmod(tmp, 0o644)
    fig.clear()
    return path


def _check_dpi(dpi: float) -> float:
    if isinstance(dpi, bool) or not isinstance(dpi, (int, float)) or not (
            _DPI_RANGE[0] <= dpi <= _DPI_RANGE[1]):
        raise ParameterError(f"dpi = {dpi!r} must be a number in [{_DPI_RANGE[0]}, "
                             f"{_DPI_RANGE[1]}]")
    return float(dpi)


def _label_bands(ax: Axes, frontend: FrontEndConfig, *, min_gap: float,
                 show_labels: bool = True) -> None:
    positions, labels = _hz_ticks(frontend, min_gap=min_gap)
    ax.set_yticks(positions, labels if show_labels else [""] * len(labels))
    ax.set_ylim(-0.5, frontend.n_mels - 0.5)


# ------------------------------------------------------------------------- draw_model


def draw_model(
    model_path: str | Path,
    out_dir: str | Path,
    *,
    n_units: int = 16,
    dpi: float = 100,
    pipe: FeaturePipeline | None = None,
    summary: dict[str, Any] | None = None,
) -> list[Path]:
    """Draw what a trained model learned, as three PNG files.

    ``receptive_fields.png``
        The ``n_units`` hidden units with the largest filter norm ``‖W_j / σ²‖``, each a
        context-offset × mel-band image of its filter ``W_ij / σ_i²`` (see
        :func:`receptive_field`): the weights the unit applies to a standardised window,
        so red is where energy above the band's training mean drives the unit on and
        blue where it holds it off. Each panel is scaled to its own largest magnitude
        (printed above it); the colour map is centred at zero. Low frequencies at the
        bottom, earliest frame on the left.
    ``sigma_per_band.png``
        The learned visible standard deviation σ of each mel band against its centre
        frequency, in standardised units: 1 is the band's spread over the training
        frames, so σ well below 1 means the hidden units explain most of that band.
    ``training_curves.png``
        Per-epoch reconstruction error (train and validation), the validation-minus-
        training free-energy gap, mean hidden activity, the share of dead units, the σ
        range and the learning-rate scale with roll-backs, from the model file's history.

    Parameters
    ----------
    model_path : str or Path
        A model file written by :func:`timbrel.training.train`.
    out_dir : str or Path
        Folder for the PNGs; created if missing. Existing files of those names are
        replaced atomically.
    n_units : int, default 16
        Receptive fields to show, in [1, 100]; fewer if the model has fewer units.
    dpi : float, default 100
        Pixels per inch, in [10, 600]. Each PNG is ``int(figsize * dpi)`` pixels: see
        :func:`receptive_fields_figsize`, ``SIGMA_FIGSIZE`` and ``CURVES_FIGSIZE``.
    pipe : FeaturePipeline, optional
        The model file already loaded (default: loaded here).
    summary : dict, optional
        Its :func:`timbrel.pipeline.describe_model` summary (default: made here).

    Returns
    -------
    list of Path
        The three files, in the order above.

    Raises
    ------
    ParameterError
        If an option is out of range, or matplotlib is not installed.
    ModelFileError
        If the model file is unusable.
    """
    _require_matplotlib()
    if isinstance(n_units, bool) or not isinstance(n_units, (int, np.integer)) or not (
            1 <= n_units <= _MAX_UNITS):
        raise ParameterError(f"n_units = {n_units!r} must be an integer in [1, {_MAX_UNITS}]")
    dpi = _check_dpi(dpi)
    from .pipeline import describe_model, load_pipeline

    model_path = Path(model_path)
    pipe = load_pipeline(model_path) if pipe is None else pipe
    out_dir = Path(out_dir)
    if out_dir.exists() and not out_dir.is_dir():
        raise ParameterError(f"{out_dir}: exists and is not a folder")
    out_dir.mkdir(parents=True, exist_ok=True)
    name = model_path.name
    written = [
        _save(_receptive_fields_figure(pipe, int(n_units), dpi=dpi, name=name),
              out_dir / RECEPTIVE_FIELDS_FILE, title=f"receptive fields of {name}"),
        _save(_sigma_figure(pipe, summary or describe_model(model_path, pipe), dpi=dpi,
                            name=name),
              out_dir / SIGMA_FILE, title=f"sigma per band of {name}"),
        _save(_curves_figure(pipe.history, dpi=dpi, name=name),
              out_dir / TRAINING_CURVES_FILE, title=f"training curves of {name}"),
    ]
    return written


def inspect_model(model_path: str | Path, plots: str | Path | None = None) -> dict[str, Any]:
    """Summarise a model file and, with ``plots``, draw its pictures; the file is read once.

    Parameters
    ----------
    model_path : str or Path
    plots : str or Path, optional
        Folder for the pictures of :func:`draw_model`.

    Returns
    -------
    dict
        :func:`timbrel.pipeline.describe_model`'s summary, with ``plots`` (the PNG paths as
        strings) when pictures were drawn.
    """
    from .pipeline import describe_model, load_pipeline

    pipe = load_pipeline(model_path)
    summary = describe_model(model_path, pipe)
    if plots is not None:
        drawn = draw_model(model_path, plots, pipe=pipe, summary=summary)
        summary["plots"] = [str(p) for p in drawn]
    return summary


def _filters(pipe: FeaturePipeline) -> np.ndarray:
    fe = pipe.config.frontend
    return receptive_field(pipe.rbm.weights_, pipe.rbm.sigma_, (fe.n_positions, fe.n_mels))


def _receptive_fields_figure(pipe: FeaturePipeline, n_units: int, *, dpi: float,
                             name: str) -> Figure:
    fe = pipe.config.frontend
    fields = _filters(pipe)
    norms = np.linalg.norm(fields.reshape(len(fields), -1), axis=1)
    shown = np.argsort(-norms, kind="stable")[:n_units]
    cols, rows = _grid(len(shown))
    fig = _new_figure(receptive_fields_figsize(len(shown)), dpi)
    axes = fig.subplots(rows, cols, squeeze=False, sharex=True, sharey=True)
    extent = (-fe.context - 0.5, fe.context + 0.5, -0.5, fe.n_mels - 0.5)
    image = None
    for k, ax in enumerate(axes.flat):
        if k >= len(shown):
            ax.set_axis_off()
            continue
        unit = int(shown[k])
        field = fields[unit]
        peak = float(np.abs(field).max())
        # each panel on its own scale: units differ in strength by orders of magnitude
        image = ax.imshow((field / peak if peak > 0 else field).T, origin="lower",
                          aspect="auto", cmap=_FIELD_CMAP, vmin=-1.0, vmax=1.0,
                          extent=extent, interpolation="nearest")
        ax.set_title(f"unit {unit}  (±{peak:.2g})", fontsize=9)
        row, col = divmod(k, cols)
        _label_bands(ax, fe, min_gap=0.14)
        ax.tick_params(labelsize=8, labelleft=col == 0,
                       labelbottom=row == rows - 1 or k + cols >= len(shown))
        ax.set_xticks(_offset_ticks(fe.context))
    hop = fe.hop_length / fe.sample_rate * 1000.0
    fig.supxlabel(f"frame offset in the context window (1 frame = {hop:g} ms hop)",
                  fontsize=10)
    fig.supylabel("mel band centre frequency (Hz)", fontsize=10)
    fig.suptitle(f"{name}: filters W/σ² of the {len(shown)} strongest of "
                 f"{fields.shape[0]} hidden units (ranked by ‖W/σ²‖)\n"
                 "red: energy above the band's mean drives the unit on, blue holds it off",
                 fontsize=11)
    if image is not None:
        bar = fig.colorbar(image, ax=axes, shrink=0.6, pad=0.02)
        bar.set_label("W/σ² ÷ the panel's ± value", fontsize=9)
        bar.ax.tick_params(labelsize=8)
    return fig


def _offset_ticks(context: int) -> np.ndarray:
    """Whole frame offsets, including 0, at most about seven of them."""
    step = max(1, math.ceil((2 * context + 1) / 7))
    return np.arange(-(context // step) * step, context + 1, step)


def _integer_locator(n_bins: int) -> Any:
    from matplotlib.ticker import MaxNLocator

    return MaxNLocator(nbins=n_bins, integer=True)


def _sigma_figure(pipe: FeaturePipeline, summary: dict[str, Any], *, dpi: float,
                  name: str) -> Figure:
    fe = pipe.config.frontend
    rows = summary["sigma_per_band"]
    bands = np.array([r["band"] for r in rows], np.float64)
    sigma_band = np.array([r["sigma"] for r in rows], np.float64)
    per_unit = np.asarray(pipe.rbm.sigma_, np.float64).reshape(fe.n_positions, fe.n_mels)
    fig = _new_figure(SIGMA_FIGSIZE, dpi)
    ax = fig.add_subplot()
    ax.axhline(1.0, color="0.45", linestyle="--", linewidth=1.2,
               label="σ = 1: the band's training spread (nothing explained)")
    if fe.n_positions > 1 and np.ptp(per_unit, axis=0).max() > 0:
        # untied variances: show how σ differs across the context positions of a band
        ax.fill_between(bands, per_unit.min(axis=0), per_unit.max(axis=0), color="C0",
                        alpha=0.2, linewidth=0, label="range over context positions")
    ax.plot(bands, sigma_band, marker="o", markersize=4, color="C0", linewidth=1.8,
            label="learned σ" + (" (mean over context positions)" if fe.n_positions > 1
                                 else ""))
    # bands are equally spaced in mels: a band axis keeps the points evenly spread,
    # with round frequencies as ticks
    positions, labels = _hz_ticks(fe, min_gap=0.06)
    ax.set_xticks(positions, labels)
    ax.set_xlim(-0.5, fe.n_mels - 0.5)
    band_axis = ax.secondary_xaxis("top")
    band_axis.xaxis.set_major_locator(_integer_locator(10))
    band_axis.set_xlabel("mel band index", fontsize=9)
    band_axis.tick_params(labelsize=8)
    top = max(1.15, float(np.nanmax(sigma_band)) * 1.1)
    ax.set_ylim(0.0, top)
    ax.set_xlabel("mel band centre frequency (Hz), mel-spaced axis")
    ax.set_ylabel("σ (standardised units)")
    ax.set_title(f"{name}: learned visible σ per mel band ({fe.n_mels} bands)")
    ax.grid(True, which="major", alpha=0.3)
    ax.legend(loc="lower right", fontsize=9)
    return fig


def _curves_figure(history: list[dict[str, Any]], *, dpi: float, name: str) -> Figure:
    fig = _new_figure(CURVES_FIGSIZE, dpi)
    axes = fig.subplots(2, 3, sharex=True)
    epochs = _history_series(history, "epoch")
    if history and np.isnan(epochs).any():
        epochs = np.arange(1, len(history) + 1, dtype=np.float64)
    style = dict(marker="o", markersize=3, linewidth=1.6)

    def panel(ax: Axes, title: str, ylabel: str,
              lines: list[tuple[str, str, dict[str, Any]]]) -> bool:
        drawn = False
        for key, label, extra in lines:
            values = _history_series(history, key)
            if np.isfinite(values).any():
                ax.plot(epochs, values, label=label, **{**style, **extra})
                drawn = True
        ax.set_title(title, fontsize=10)
        ax.set_ylabel(ylabel, fontsize=9)
        ax.tick_params(labelsize=8)
        ax.grid(True, alpha=0.3)
        if not drawn:
            ax.text(0.5, 0.5, "not recorded", transform=ax.transAxes, ha="center",
                    va="center", color="0.4")
        elif len(lines) > 1:
            ax.legend(fontsize=8)
        return drawn

    panel(axes[0, 0], "reconstruction error", "mean squared error (std. units)", [
        ("recon_error", "train, during epoch (sampled hiddens)", {"linestyle": ":"}),
        ("train_probe_recon_error", "train, end of epoch (mean-field)", {}),
        ("val_recon_error", "validation, end of epoch (mean-field)", {}),
    ])
    if panel(axes[0, 1], "free-energy gap (validation − train)", "mean free energy difference",
             [("free_energy_gap", "gap", {"color": "C3"})]):
        axes[0, 1].axhline(0.0, color="0.45", linewidth=1.0, linestyle="--")
    panel(axes[0, 2], "mean hidden activity", "mean activation per unit",
          [("mean_hidden_activity", "activity", {"color": "C2"})])
    dead = _history_series(history, "dead_fraction") * 100.0
    ax = axes[1, 0]
    if np.isfinite(dead).any():
        ax.plot(epochs, dead, color="C4", **style)
        ax.set_ylim(-2.0, max(10.0, float(np.nanmax(dead)) * 1.15))
    else:
        ax.text(0.5, 0.5, "not recorded", transform=ax.transAxes, ha="center", color="0.4")
    ax.set_title("dead hidden units (never positive in an epoch)", fontsize=10)
    ax.set_ylabel("% of hidden units", fontsize=9)
    ax.tick_params(labelsize=8)
    ax.grid(True, alpha=0.3)
    ax = axes[1, 1]
    low, high = (_history_series(history, k) for k in ("sigma_min", "sigma_max"))
    if np.isfinite(low).any() and np.isfinite(high).any():
        ax.fill_between(epochs, low, high, color="C0", alpha=0.2, linewidth=0)
        ax.plot(epochs, high, color="C0", label="largest σ", **style)
        ax.plot(epochs, low, color="C0", linestyle="--", label="smallest σ", **style)
        ax.axhline(1.0, color="0.45", linewidth=1.0, linestyle=":", label="σ = 1")
        ax.legend(fontsize=8)
    else:
        ax.text(0.5, 0.5, "not recorded", transform=ax.transAxes, ha="center", color="0.4")
    ax.ticklabel_format(axis="y", useOffset=False)
    ax.set_title("range of the learned σ", fontsize=10)
    ax.set_ylabel("σ (standardised units)", fontsize=9)
    ax.tick_params(labelsize=8)
    ax.grid(True, alpha=0.3)
    ax = axes[1, 2]
    if panel(ax, "learning-rate scale (× marks roll-backs)", "factor on all rates",
             [("learning_rate_scale", "scale", {"color": "C5"})]):
        scale = _history_series(history, "learning_rate_scale")
        if np.nanmin(scale) > 0:
            ax.set_yscale("log")
        rollbacks = _history_series(history, "rollbacks")
        hit = np.nan_to_num(rollbacks) > 0
        if hit.any():
            ax.plot(epochs[hit], scale[hit], linestyle="none", marker="x", markersize=9,
                    color="C3", markeredgewidth=2)
            for e, s, r in zip(epochs[hit], scale[hit], rollbacks[hit], strict=True):
                ax.annotate(f"{int(r)}", (e, s), textcoords="offset points", xytext=(5, 5),
                            fontsize=8, color="C3")
    for ax in axes.flat:
        ax.xaxis.set_major_locator(_integer_locator(8))
    for ax in axes[1]:
        ax.set_xlabel("epoch", fontsize=9)
    stored = f"epochs {int(epochs[0])}–{int(epochs[-1])}" if history else "no history stored"
    fig.suptitle(f"{name}: training curves ({stored})", fontsize=12)
    return fig


# ------------------------------------------------------------------------- draw_clip


def draw_clip(
    audio_path: str | Path,
    model_path: str | Path,
    out_file: str | Path,
    *,
    order: str = "peak_time",
    dpi: float = 100,
) -> Path:
    """Draw a clip's log-mel spectrogram above the model's hidden activations.

    The clip is read and framed exactly as the model's training audio was (its stored
    front end: sample rate, channel, bands). Both panels share one time axis in seconds,
    at frame centres (frame ``i`` centred at ``(i * hop + n_fft / 2) / sample_rate``).
    Low frequencies at the bottom.

    Parameters
    ----------
    audio_path : str or Path
        An audio file timbrel can read.
    model_path : str or Path
        A model file written by :func:`timbrel.training.train`.
    out_file : str or Path
        PNG to write (parent folders are created; an existing file is replaced
        atomically). ``int(CLIP_FIGSIZE * dpi)`` pixels.
    order : {"peak_time", "strength"}, default "peak_time"
        How hidden units are sorted from bottom to top: by the time of their largest
        activation in this clip (units silent throughout go on top), or by filter norm
        ``‖W_j / σ²‖``, strongest at the bottom. See :func:`order_units`.
    dpi : float, default 100
        Pixels per inch, in [10, 600].

    Returns
    -------
    Path
        ``out_file``.

    Raises
    ------
    ParameterError
        If an option is out of range, the clip is shorter than one frame, or matplotlib
        is not installed.
    AudioReadError, ModelFileError
        If the audio or the model file is unusable.
    """
    _require_matplotlib()
    if order not in UNIT_ORDERS:
        raise ParameterError(f"order = {order!r} is not one of {', '.join(UNIT_ORDERS)}")
    dpi = _check_dpi(dpi)
    from .audio import load
    from .frontend import FrontEnd
    from .pipeline import load_pipeline

    audio_path, out_file = Path(audio_path), Path(out_file)
    pipe = load_pipeline(model_path)
    fe = pipe.config.frontend
    y = load(audio_path, sr=fe.sample_rate, channel=fe.channel)
    frames = FrontEnd(fe).frames(y, fe.sample_rate)
    if len(frames) == 0:
        raise ParameterError(f"{audio_path}: {len(y) / fe.sample_rate:.3f} s is shorter than "
                             f"one analysis frame ({fe.fft_length / fe.sample_rate:.3f} s)")
    activations = pipe.features(frames)
    fig = _clip_figure(frames, activations, pipe, order=order, dpi=dpi,
                       name=audio_path.name, model_name=Path(model_path).name)
    out_file.parent.mkdir(parents=True, exist_ok=True)
    return _save(fig, out_file, title=f"{audio_path.name} through {Path(model_path).name}")


def _clip_figure(frames: np.ndarray, activations: np.ndarray, pipe: FeaturePipeline, *,
                 order: str, dpi: float, name: str, model_name: str) -> Figure:
    fe = pipe.config.frontend
    n_frames = len(frames)
    hop = fe.hop_length / fe.sample_rate
    first = fe.fft_length / 2 / fe.sample_rate
    # pixel edges half a hop either side of the first and last frame centre
    t0, t1 = first - hop / 2, first + (n_frames - 0.5) * hop
    fields = _filters(pipe)
    strength = np.linalg.norm(fields.reshape(len(fields), -1), axis=1)
    units = order_units(activations, by=order, strength=strength)
    sorted_acts = activations[:, units].T
    n_hidden = sorted_acts.shape[0]

    fig = _new_figure(CLIP_FIGSIZE, dpi)
    top, bottom = fig.subplots(2, 1, sharex=True, height_ratios=(1, 1.2))
    spec = top.imshow(frames.T, origin="lower", aspect="auto", cmap=_SPECTROGRAM_CMAP,
                      extent=(t0, t1, -0.5, fe.n_mels - 0.5), interpolation="nearest")
    _label_bands(top, fe, min_gap=0.07)
    top.set_ylabel("mel band centre (Hz)")
    top.set_title(f"log-mel spectrogram ({fe.n_mels} bands, {fe.hop_ms:g} ms hop)",
                  fontsize=10)
    bar = fig.colorbar(spec, ax=top, pad=0.01)
    bar.set_label("ln(mel power)", fontsize=9)

    peak = float(sorted_acts.max()) if sorted_acts.size else 0.0
    # rectified units are unbounded: a few large values would leave the rest dark
    top_colour = float(np.percentile(sorted_acts, _ACTIVATION_PERCENTILE)) if peak > 0 else 1.0
    clipped = 0 < top_colour < peak
    if not clipped:
        top_colour = peak if peak > 0 else 1.0
    acts = bottom.imshow(sorted_acts, origin="lower", aspect="auto", cmap=_ACTIVATION_CMAP,
                         vmin=0.0, vmax=top_colour,
                         extent=(t0, t1, -0.5, n_hidden - 0.5), interpolation="nearest")
    bottom.yaxis.set_major_locator(_integer_locator(6))
    how = ("by time of peak activation, earliest at the bottom" if order == "peak_time"
           else "by filter norm ‖W/σ²‖, strongest at the bottom")
    bottom.set_ylabel("hidden unit (rank)")
    n_active = int((activations.max(axis=0) > 0).sum())
    bottom.set_title(f"hidden activations: {n_active} of {n_hidden} units active, "
                     f"sorted {how}", fontsize=10)
    bottom.set_xlabel("time (s)")
    bottom.set_xlim(t0, t1)
    bar = fig.colorbar(acts, ax=bottom, pad=0.01, extend="max" if clipped else "neither")
    bar.set_label(f"{pipe.rbm.hidden} activation"
                  + (f" (clipped; max {peak:.3g})" if clipped else ""), fontsize=9)
    if peak <= 0:
        bottom.text(0.5, 0.5, "no hidden unit is active in this clip", ha="center",
                    va="center", transform=bottom.transAxes, color="white")
    fig.suptitle(f"{name} through {model_name}", fontsize=12)
    return fig


"""Tests of timbrel.plots: the pure helpers against numpy, librosa and scipy, the PNG files
(readable, sized figsize × dpi, not blank), the picture's axes telling the truth about a
chirp, and the error when matplotlib is missing."""

from __future__ import annotations

import subprocess
import sys

import librosa
import numpy as np
import pytest
import scipy.signal
import soundfile as sf

from timbrel import ParameterError, TimbrelError
from timbrel.cache import build_cache
from timbrel.config import FrontEndConfig, load_config
from timbrel.frontend import stack_context
from timbrel.pipeline import describe_model, load_pipeline
from timbrel.plots import (
    CLIP_FIGSIZE,
    CURVES_FIGSIZE,
    PLOT_EXTRA_MESSAGE,
    RECEPTIVE_FIELDS_FILE,
    SIGMA_FIGSIZE,
    SIGMA_FILE,
    TRAINING_CURVES_FILE,
    band_centres,
    band_position,
    draw_clip,
    draw_model,
    order_units,
    receptive_field,
    receptive_fields_figsize,
)
from timbrel.training import train

matplotlib_image = pytest.importorskip("matplotlib.image")

SR = 16000
N_MELS, CONTEXT, N_HIDDEN = 16, 2, 24


def _chirp(seconds: float, f0: float, f1: float) -> np.ndarray:
    """A logarithmic sweep from scipy.signal.chirp (reference library)."""
    t = np.arange(int(seconds * SR)) / SR
    return scipy.signal.chirp(t, f0=f0, t1=t[-1], f1=f1, method="logarithmic")


@pytest.fixture(scope="module")
def model_file(tmp_path_factory):
    """A tiny model (16 bands, context 2, 24 units, 3 epochs) on sweeps and noise bursts."""
    root = tmp_path_factory.mktemp("plots")
    audio = root / "audio"
    audio.mkdir()
    rng = np.random.default_rng(11)
    for i in range(10):
        if i % 2:
            y = 0.3 * _chirp(0.6, 300 + 100 * i, 3000 + 300 * i)
        else:
            y = 0.2 * rng.standard_normal(int(0.6 * SR)) * (np.arange(int(0.6 * SR)) < SR // 3)
        y = y + 0.01 * rng.standard_normal(y.size)
        sf.write(audio / f"c{i:02d}.wav", y.astype(np.float32), SR)
    overrides = [f"frontend.n_mels={N_MELS}", f"frontend.context={CONTEXT}",
                 "training.chunk_frames=300", f"model.n_hidden={N_HIDDEN}", "model.epochs=3",
                 "model.seed=3", "model.batch_size=64", "model.variance_learning_rate=0.001"]
    config = load_config(overrides=overrides)
    build_cache(audio, root / "cache", config=config, workers=1)
    train(root / "cache", root / "m.npz", config=config)
    return root / "m.npz"


@pytest.fixture(scope="module")
def drawn(model_file, tmp_path_factory):
    out = tmp_path_factory.mktemp("pictures") / "new" / "folder"
    # more units asked for than the model has: all 24 are shown
    return draw_model(model_file, out, n_units=30, dpi=80)


@pytest.fixture(scope="module")
def chirp_file(tmp_path_factory):
    path = tmp_path_factory.mktemp("clip") / "sweep.wav"
    sf.write(path, (0.3 * _chirp(1.0, 300.0, 5000.0)).astype(np.float32), SR)
    return path


def _read_png(path):
    image = matplotlib_image.imread(path)
    assert image.ndim == 3 and image.shape[2] in (3, 4), image.shape
    return image[..., :3]


def _assert_not_blank(rgb: np.ndarray, *, min_chromatic: float) -> None:
    # Measured here: a figure of empty axes with titles, labels and grid has pixel std ~0.13
    # and no chromatic pixel at all (text, axes and grid are grey), while every data line
    # or image is drawn in colour. So the share of chromatic pixels (channels differing by
    # more than 0.15) shows that data were drawn; the std excludes a flat fill.
    assert float(rgb.std()) > 0.05
    chromatic = (rgb.max(axis=2) - rgb.min(axis=2)) > 0.15
    assert float(chromatic.mean()) >= min_chromatic, float(chromatic.mean())


def _pixels(figsize, dpi):
    # matplotlib's Agg canvas is int(figsize × dpi) pixels in each direction (RendererAgg
    # truncates a fractional pixel: from memory of backend_agg, as the dpi=55 case shows)
    # when nothing crops it, e.g. bbox_inches="tight"
    return (int(figsize[1] * dpi), int(figsize[0] * dpi))


# ---------------------------------------------------------------------- pure helpers


@pytest.mark.parametrize("n_mels, fmin, fmax, scale", [
    (40, 0.0, None, "slaney"), (16, 50.0, 7000.0, "slaney"), (64, 20.0, 8000.0, "htk"),
    (1, 0.0, None, "htk")])
def test_band_centres_match_librosa(n_mels, fmin, fmax, scale):
    fe = FrontEndConfig(n_mels=n_mels, fmin=fmin, fmax=fmax, mel_scale=scale)
    # reference: librosa.mel_frequencies gives the n_mels + 2 filter edges; the centres
    # are the inner ones (librosa's mel filter construction)
    edges = librosa.mel_frequencies(n_mels=n_mels + 2, fmin=fmin, fmax=fe.upper_frequency,
                                    htk=scale == "htk")
    np.testing.assert_allclose(band_centres(fe), edges[1:-1], rtol=1e-9)


@pytest.mark.parametrize("scale", ["slaney", "htk"])
def test_band_position_is_linear_in_librosa_mels_and_hits_each_centre(scale):
    fe = FrontEndConfig(n_mels=24, fmin=30.0, mel_scale=scale)
    np.testing.assert_allclose(band_position(band_centres(fe), fe), np.arange(24), atol=1e-9)
    hz = np.random.default_rng(0).uniform(30.0, fe.upper_frequency, 200)
    # reference: librosa.hz_to_mel; between the edges, position is an affine map of mels
    mels = librosa.hz_to_mel(hz, htk=scale == "htk")
    low = librosa.hz_to_mel(30.0, htk=scale == "htk")
    step = (librosa.hz_to_mel(fe.upper_frequency, htk=scale == "htk") - low) / 25
    np.testing.assert_allclose(band_position(hz, fe), (mels - low) / step - 1, rtol=1e-9,
                               atol=1e-9)


@pytest.mark.parametrize("layout, n_hidden", [((5, 16), 7), ((1, 40), 3), ((11, 40), 12),
                                              ((3, 1), 2)])
def test_receptive_field_is_the_weight_column_reshaped(layout, n_hidden):
    rng = np.random.default_rng(sum(layout) + n_hidden)
    n_positions, n_bands = layout
    weights = rng.standard_normal((n_positions * n_bands, n_hidden)).astype(np.float32)
    sigma = rng.uniform(0.2, 1.5, n_positions * n_bands).astype(np.float32)
    fields = receptive_field(weights, sigma, layout)
    raw = receptive_field(weights, sigma, layout, divide_by_variance=False)
    assert fields.shape == raw.shape == (n_hidden, n_positions, n_bands)
    assert fields.dtype == np.float32
    for unit in range(n_hidden):
        # reference: numpy reshape of the column, row-major (visible = position * n_bands + band)
        np.testing.assert_array_equal(raw[unit], weights[:, unit].reshape(n_positions, n_bands))
        np.testing.assert_allclose(fields[unit], (weights[:, unit] / sigma ** 2).reshape(
            n_positions, n_bands), rtol=1e-6)


def test_receptive_field_applied_to_frames_is_the_hidden_input(model_file):
    """The picture's (offset, band) cell multiplies that band of that neighbouring frame."""
    pipe = load_pipeline(model_file)
    rbm, fe = pipe.rbm, pipe.config.frontend
    fields = receptive_field(rbm.weights_, rbm.sigma_, (fe.n_positions, fe.n_mels))
    frames = np.random.default_rng(4).standard_normal((30, fe.n_mels)).astype(np.float32)
    windows = stack_context(frames, fe.context)
    t = np.arange(fe.context, len(frames) - fe.context)  # frames with a full context
    by_picture = np.stack([
        np.einsum("jpb,pb->j", fields, frames[i - fe.context:i + fe.context + 1]) for i in t])
    by_picture += rbm.hidden_bias_
    # relu mean activation is max(0, x) (Nair & Hinton 2010)
    np.testing.assert_allclose(np.maximum(by_picture, 0), rbm.transform(windows[t]),
                               rtol=1e-4, atol=1e-4)


@pytest.mark.parametrize("weights_shape, sigma_shape, layout", [
    ((80,), (80,), (5, 16)), ((80, 4), (80,), (4, 16)), ((80, 4), (79,), (5, 16)),
    ((80, 4), (80,), (5, 16, 1))])
def test_receptive_field_refuses_mismatched_shapes(weights_shape, sigma_shape, layout):
    with pytest.raises(ParameterError):
        receptive_field(np.ones(weights_shape), np.ones(sigma_shape), layout)


def test_receptive_field_refuses_non_positive_sigma():
    sigma = np.ones(10)
    sigma[3] = 0.0
    with pytest.raises(ParameterError, match="positive"):
        receptive_field(np.ones((10, 2)), sigma, (2, 5))


@pytest.mark.parametrize("seed", range(5))
def test_peak_time_order_sorts_active_units_by_argmax_and_puts_silent_ones_last(seed):
    rng = np.random.default_rng(seed)
    acts = np.maximum(rng.standard_normal((50, 30)) - 1.0, 0.0).astype(np.float32)
    acts[:, rng.choice(30, 6, replace=False)] = 0.0
    order = order_units(acts, by="peak_time")
    assert sorted(order.tolist()) == list(range(30))
    active = acts.max(axis=0) > 0
    n_active = int(active.sum())
    assert active[order[:n_active]].all() and not active[order[n_active:]].any()
    # reference: numpy argmax of each unit's column
    peaks = np.argmax(acts, axis=0)[order[:n_active]]
    assert np.all(np.diff(peaks) >= 0)


def test_strength_order_is_descending_strength():
    rng = np.random.default_rng(9)
    strength = rng.uniform(0, 1, 20)
    order = order_units(np.zeros((5, 20)), by="strength", strength=strength)
    assert np.all(np.diff(strength[order]) <= 0)
    with pytest.raises(ParameterError, match="strength"):
        order_units(np.zeros((5, 20)), by="strength")
    with pytest.raises(ParameterError, match="loudest"):
        order_units(np.zeros((5, 20)), by="loudest")


@pytest.mark.parametrize("n_shown, grid", [(9, (3, 3)), (12, (4, 3)), (16, (4, 4)),
                                           (25, (5, 5)), (26, (6, 5)), (100, (10, 10))])
def test_receptive_field_grid_gives_each_panel_two_inches(n_shown, grid):
    width, height = receptive_fields_figsize(n_shown)
    cols, rows = grid  # a near-square grid, columns = ceil(sqrt(n))
    assert cols * 2.0 < width <= cols * 2.0 + 2.0
    assert rows * 2.0 < height <= rows * 2.0 + 2.0


def test_receptive_field_figure_never_shrinks_as_panels_are_added():
    sizes = np.array([receptive_fields_figsize(n) for n in range(1, 101)])
    assert np.all(np.diff(sizes, axis=0) >= 0)


@pytest.mark.parametrize("n_shown", [1, 2, 3, 4])
def test_a_few_receptive_fields_keep_a_readable_figure(n_shown):
    width, height = receptive_fields_figsize(n_shown)
    assert width >= 7.5 and height >= 4.5


@pytest.mark.parametrize("n_mels, fmin, fmax", [(40, 0.0, None), (16, 0.0, None),
                                                (64, 1000.0, 1500.0), (3, 200.0, 400.0),
                                                (1, 0.0, None)])
def test_hz_ticks_sit_at_the_frequency_they_name(n_mels, fmin, fmax):
    from timbrel.plots import _hz_ticks

    fe = FrontEndConfig(n_mels=n_mels, fmin=fmin, fmax=fmax)
    positions, labels = _hz_ticks(fe, min_gap=0.1)
    assert len(positions) >= 1 and len(positions) == len(labels)
    if n_mels > 1:
        assert len(positions) >= 2
    assert np.all((positions >= -0.5) & (positions <= n_mels - 0.5))
    named = np.array([float(t[:-1]) * 1000 if t.endswith("k") else float(t) for t in labels])
    exact = np.isclose(band_position(named, fe), positions, rtol=0, atol=1e-9)
    # otherwise the tick is a band centre labelled to three significant figures, which
    # rounds by at most half a unit of the third figure: 0.5%
    centres = band_centres(fe)
    for pos, hz in zip(positions[~exact], named[~exact], strict=True):
        assert pos == int(pos)
        assert abs(hz - centres[int(pos)]) <= 0.005 * centres[int(pos)]


@pytest.mark.parametrize("context", [0, 1, 2, 5, 20, 50])
def test_offset_ticks_are_whole_frames_around_zero(context):
    from timbrel.plots import _offset_ticks

    ticks = _offset_ticks(context)
    assert 0 in ticks and len(ticks) <= 8
    assert np.all(np.abs(ticks) <= context)
    assert np.issubdtype(ticks.dtype, np.integer)


# ---------------------------------------------------------------------- draw_model


def test_draw_model_writes_three_readable_sized_non_blank_pngs(drawn, model_file):
    names = [RECEPTIVE_FIELDS_FILE, SIGMA_FILE, TRAINING_CURVES_FILE]
    assert [p.name for p in drawn] == names
    folder = drawn[0].parent
    assert sorted(p.name for p in folder.iterdir()) == sorted(names)  # no temporaries left
    sizes = [receptive_fields_figsize(N_HIDDEN), SIGMA_FIGSIZE, CURVES_FIGSIZE]
    # images of weights fill much of their figure; line plots colour only their lines
    min_chromatic = [0.05, 0.003, 0.003]
    for path, figsize, share in zip(drawn, sizes, min_chromatic, strict=True):
        assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (RFC 2083)
        assert path.stat().st_mode & 0o044 == 0o044  # readable by group and others
        rgb = _read_png(path)
        assert rgb.shape[:2] == _pixels(figsize, 80)
        _assert_not_blank(rgb, min_chromatic=share)


@pytest.mark.parametrize("dpi", [40, 55])
def test_png_size_is_figsize_times_dpi(model_file, tmp_path, dpi):
    paths = draw_model(model_file, tmp_path, n_units=1, dpi=dpi)
    for path, figsize in zip(paths, [receptive_fields_figsize(1), SIGMA_FIGSIZE,
                                     CURVES_FIGSIZE], strict=True):
        assert _read_png(path).shape[:2] == _pixels(figsize, dpi)


def test_sigma_figure_plots_the_model_sigma_per_band(model_file):
    from timbrel.plots import _sigma_figure

    pipe = load_pipeline(model_file)
    fig = _sigma_figure(pipe, describe_model(model_file), dpi=50, name="m")
    (line,) = [ln for ln in fig.axes[0].lines if ln.get_label().startswith("learned")]
    # reference: numpy mean over context positions of RBM.sigma_ (position-major layout)
    expected = np.asarray(pipe.rbm.sigma_, np.float64).reshape(1 + 2 * CONTEXT, N_MELS)
    np.testing.assert_allclose(line.get_ydata(), expected.mean(axis=0), atol=1e-4)
    assert not np.allclose(line.get_ydata(), 1.0)  # the variances did move in training


def test_training_curves_plot_the_stored_history(model_file):
    from timbrel.plots import _curves_figure

    history = load_pipeline(model_file).history
    fig = _curves_figure(history, dpi=50, name="m")
    lines = {ln.get_label(): ln for ax in fig.axes for ln in ax.lines}
    validation = lines["validation, end of epoch (mean-field)"]
    np.testing.assert_allclose(validation.get_xdata(), [h["epoch"] for h in history])
    np.testing.assert_allclose(validation.get_ydata(), [h["val_recon_error"] for h in history])
    np.testing.assert_allclose(lines["largest σ"].get_ydata(), [h["sigma_max"] for h in history])


def test_curves_of_an_empty_history_still_draw():
    from timbrel.plots import _curves_figure

    fig = _curves_figure([], dpi=40, name="m")
    texts = [t.get_text() for ax in fig.axes for t in ax.texts]
    assert texts.count("not recorded") == 6


@pytest.mark.parametrize("options, named", [
    ({"n_units": 0}, "n_units = 0"), ({"n_units": 101}, "n_units = 101"),
    ({"n_units": 2.5}, "n_units = 2.5"), ({"n_units": True}, "n_units = True"),
    ({"dpi": 5}, "dpi = 5"), ({"dpi": 1000}, "dpi = 1000"), ({"dpi": "100"}, "dpi = '100'")])
def test_draw_model_names_a_bad_option(model_file, tmp_path, options, named):
    with pytest.raises(ParameterError, match=named):
        draw_model(model_file, tmp_path / "out", **options)
    assert not (tmp_path / "out").exists()


# ---------------------------------------------------------------------- draw_clip


@pytest.mark.parametrize("order", ["peak_time", "strength"])
def test_draw_clip_on_a_chirp_writes_a_sized_non_blank_png(chirp_file, model_file, tmp_path,
                                                            order):
    out = draw_clip(chirp_file, model_file, tmp_path / "deep" / "clip.png", order=order, dpi=60)
    assert out == tmp_path / "deep" / "clip.png"
    assert out.stat().st_mode & 0o044 == 0o044
    assert [p.name for p in out.parent.iterdir()] == ["clip.png"]  # no temporary left
    rgb = _read_png(out)
    assert rgb.shape[:2] == _pixels(CLIP_FIGSIZE, 60)
    _assert_not_blank(rgb, min_chromatic=0.3)  # two colour-mapped images fill the figure


def test_clip_picture_puts_the_chirp_where_its_axes_say(chirp_file, model_file):
    """Low frequencies at the bottom, time left to right, Hz ticks at the right heights."""
    from timbrel.audio import load
    from timbrel.frontend import FrontEnd
    from timbrel.plots import _clip_figure

    pipe = load_pipeline(model_file)
    fe = pipe.config.frontend
    frames = FrontEnd(fe).frames(load(chirp_file, sr=SR), SR)
    fig = _clip_figure(frames, pipe.features(frames), pipe, order="peak_time", dpi=80,
                       name="sweep.wav", model_name="m.npz")
    fig.canvas.draw()
    pixels = np.asarray(fig.canvas.buffer_rgba())[..., :3].astype(np.float64)
    spectrogram, activations = fig.axes[0], fig.axes[1]
    assert spectrogram.get_xlim() == activations.get_xlim()  # one shared time axis
    box = spectrogram.get_window_extent()
    height = pixels.shape[0]
    cols = np.arange(int(box.x0) + 2, int(box.x1) - 2)
    rows = np.arange(height - int(box.y1) + 2, height - int(box.y0) - 2)  # image rows top-down
    brightness = pixels[rows][:, cols].sum(axis=2)  # magma: brighter means more power
    ridge_rows = rows[np.argmax(brightness, axis=0)]
    to_data = spectrogram.transData.inverted()
    display = np.column_stack([cols + 0.5, height - ridge_rows - 0.5])
    times, measured = to_data.transform(display).T
    # reference: scipy.signal.chirp's logarithmic sweep has f(t) = f0 (f1/f0)^(t/t1)
    t1 = (int(1.0 * SR) - 1) / SR
    expected_hz = 300.0 * (5000.0 / 300.0) ** (times / t1)
    # reference: librosa.hz_to_mel for where that frequency sits among the mel bands
    low, high = librosa.hz_to_mel(0.0), librosa.hz_to_mel(SR / 2)
    expected = (librosa.hz_to_mel(expected_hz) - low) / ((high - low) / (N_MELS + 1)) - 1
    inner = (times > 0.1) & (times < 0.9)
    error = np.abs(measured[inner] - expected[inner])
    assert np.mean(error <= 1.0) >= 0.9, np.percentile(error, [50, 90, 100])
    # the tick labelled 1k sits at the height of 1 kHz on the same librosa mel scale
    labels = [t.get_text() for t in spectrogram.get_yticklabels()]
    tick = spectrogram.get_yticks()[labels.index("1k")]
    assert tick == pytest.approx((librosa.hz_to_mel(1000.0) - low)
                                 / ((high - low) / (N_MELS + 1)) - 1)


def test_draw_clip_refuses_a_clip_shorter_than_one_frame(model_file, tmp_path):
    short = tmp_path / "blip.wav"
    sf.write(short, np.zeros(100, np.float32), SR)
    with pytest.raises(ParameterError, match="shorter than one analysis frame"):
        draw_clip(short, model_file, tmp_path / "blip.png")
    assert not (tmp_path / "blip.png").exists()


def test_draw_clip_names_a_bad_order(chirp_file, model_file, tmp_path):
    with pytest.raises(ParameterError, match="order = 'loudness'"):
        draw_clip(chirp_file, model_file, tmp_path / "c.png", order="loudness")


# ---------------------------------------------------------------------- without matplotlib


@pytest.mark.parametrize("modules", [("matplotlib",),
                                     ("matplotlib.figure", "matplotlib.backends.backend_agg")])
def test_missing_matplotlib_says_which_extra_to_install(monkeypatch, tmp_path, chirp_file,
                                                        model_file, modules):
    for name in modules:
        # a None entry in sys.modules makes `import name` raise ImportError (Python docs)
        monkeypatch.setitem(sys.modules, name, None)
    with pytest.raises(ParameterError, match=r"pip install 'timbrel\[plot\]'") as caught:
        draw_model(model_file, tmp_path / "out")
    assert isinstance(caught.value, TimbrelError)
    assert str(caught.value) == PLOT_EXTRA_MESSAGE
    with pytest.raises(ParameterError, match=r"the plot extra"):
        draw_clip(chirp_file, model_file, tmp_path / "c.png")
    assert not (tmp_path / "out").exists() and not (tmp_path / "c.png").exists()


def test_importing_the_module_does_not_import_matplotlib():
    code = "import sys, timbrel.plots; print('matplotlib' in sys.modules)"
    result = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                            check=True, env={"PYTHONPATH": ":".join(sys.path)})
    assert result.stdout.strip() == "False"

"""Training under stress: learning rates x100 (and x1000), constant bands, identical and
duplicated frames. The divergence guard (roll back, halve the rates) and the sigma floor and
ceiling keep every parameter finite and within bounds, and fit says what they did.

Background (Hinton's practical guide to training RBMs, 2010): Gaussian visible units need
a much smaller learning rate than binary ones or training blows up.
"""

from __future__ import annotations

import csv
import shutil
import warnings

import numpy as np
import pytest
import soundfile as sf
from _faultkit import (
    SETTINGS,
    dataset_rows,
    invoke,
    no_traceback,
    temporaries,
    write_good_clips,
)

from timbrel.cache import FrameCache
from timbrel.model import RBM, read_model_file
from timbrel.training import history_path

SR = 16000
STRESS = ["--n-hidden", "32", "--epochs", "15", "--seed", "1"]
X100 = ["--set", "model.learning_rate=0.1", "--set", "model.variance_learning_rate=0.01"]
X1000 = ["--set", "model.learning_rate=1.0", "--set", "model.variance_learning_rate=0.1"]


@pytest.fixture(scope="module")
def caches(tmp_path_factory):
    root = tmp_path_factory.mktemp("stress")
    t = np.arange(SR) / SR
    write_good_clips(root / "good", 8, seconds=1.0)
    (root / "tones").mkdir()
    for i in range(6):  # 150-250 Hz tones: no energy in the upper mel bands
        y = 0.3 * np.sin(2 * np.pi * (150 + 20 * i) * t)
        sf.write(root / "tones" / f"t{i}.wav", y.astype(np.float32), SR, subtype="FLOAT")
    (root / "same").mkdir()
    for i in range(6):  # a constant level: every frame identical
        sf.write(root / "same" / f"s{i}.wav", np.full(SR, 0.25, np.float32), SR,
                 subtype="FLOAT")
    (root / "copies").mkdir()
    for i in range(10):  # one clip ten times over: every frame duplicated tenfold
        shutil.copy(root / "good" / "good00.wav", root / "copies" / f"c{i}.wav")
    for name in ("good", "tones", "same", "copies"):
        assert invoke("frames", root / name, "--out", root / f"cache-{name}", "-q", "-j", "1",
                      *SETTINGS).exit_code == 0
    return root


def _history(model):
    with open(history_path(model), newline="") as fh:
        return list(csv.DictReader(fh))


def _check_finite_and_bounded(model) -> RBM:
    rbm = read_model_file(model).rbm  # refuses NaN/Inf parameters itself; checked again here
    for name in ("weights_", "visible_bias_", "hidden_bias_", "sigma_"):
        assert np.isfinite(getattr(rbm, name)).all(), name
    sigma = np.asarray(rbm.sigma_)
    assert sigma.min() >= rbm.sigma_floor * (1 - 1e-5)
    assert sigma.max() <= rbm.sigma_ceiling * (1 + 1e-5)
    return rbm


@pytest.mark.parametrize("limit", ["default", "off"])
@pytest.mark.parametrize("data", ["good", "tones", "copies"])
def test_learning_rates_x100(data, limit, caches, tmp_path):
    # Safeguards: the decaying rates and the step limit (max_step, default 0.05 of the
    # weights' norm) and, behind them, the roll-back guard; with the first two off
    # (constant rates, no limit) the guard alone must hold.
    model = tmp_path / "m.npz"
    off = (["--set", "model.max_step=0", "--set", "model.learning_rate_decay=0"]
           if limit == "off" else [])
    result = invoke("fit", caches / f"cache-{data}", "--out", model, "-q", *STRESS, *X100,
                    *off)
    no_traceback(result)
    assert result.exit_code == 0, result.output
    _check_finite_and_bounded(model)
    rows = _history(model)
    assert len(rows) == 15
    # every roll-back is said on the terminal and counted in the history
    rollbacks = sum(int(r["rollbacks"]) for r in rows)
    assert result.output.count("rolled back to the parameters before the epoch") == rollbacks
    scale = float(rows[-1]["learning_rate_scale"])
    assert scale == 0.5 ** rollbacks
    limited = sum(int(r["limited_steps"]) for r in rows)
    if limit == "off":
        assert limited == 0
    if data == "tones":  # a safeguard had to act here (seeded runs), and says so
        assert (limited if limit == "default" else rollbacks) > 0
    for r in rows:
        assert int(r["sigma_at_floor"]) + int(r["sigma_at_ceiling"]) <= 48  # 3 x 16 visible


def test_learning_rates_x1000_end_in_one_clear_error_or_a_finite_model(caches, tmp_path):
    model = tmp_path / "m.npz"
    result = invoke("fit", caches / "cache-tones", "--out", model, "-q", *STRESS, *X1000)
    no_traceback(result)
    if result.exit_code == 0:
        _check_finite_and_bounded(model)
        return
    assert result.exit_code == 1
    errors = [ln for ln in result.output.splitlines() if ln.startswith("timbrel: error:")]
    assert len(errors) == 1 and "training diverged" in errors[0]
    assert "Lower learning_rate" in errors[0]
    assert not model.exists() and temporaries(tmp_path) == []


def test_constant_bands_are_named_and_harmless(caches, tmp_path):
    model = tmp_path / "m.npz"
    result = invoke("fit", caches / "cache-tones", "--out", model, "-q", *STRESS)
    assert result.exit_code == 0, result.output
    stats = FrameCache.open(caches / "cache-tones").band_stats
    constant = np.flatnonzero(stats.std <= stats.std_floor)
    # tones of 150-250 Hz: the bands near the 8 kHz top hold no energy (log of the offset)
    assert len(constant) > 0 and constant[-1] == 15 and np.all(np.diff(constant) == 1)
    assert (f"{len(constant)} of 16 mel bands are constant over the whole cache "
            f"(bands {constant[0]}-{constant[-1]})") in result.output
    _check_finite_and_bounded(model)
    out = tmp_path / "ds"
    assert invoke("export", caches / "tones", "--model", model, "--out", out, "-q",
                  "-j", "1").exit_code == 0
    assert all(np.isfinite(v).all() for v in dataset_rows(out).values())


def test_identical_frames_are_refused_with_a_reason(caches, tmp_path):
    model = tmp_path / "m.npz"
    result = invoke("fit", caches / "cache-same", "--out", model, "-q", *STRESS, *X100)
    no_traceback(result)
    assert result.exit_code == 1
    assert "every mel band is constant" in result.output and "nothing to learn" in result.output
    assert not model.exists()


@pytest.mark.parametrize("rate", [1e-3, 1e-1])
def test_a_zero_variance_column_stays_within_the_sigma_bounds(rate):
    # the estimator on its own: one column exactly constant, the rest standard normal
    rng = np.random.default_rng(0)
    X = rng.standard_normal((2000, 12)).astype(np.float32)
    X[:, 4] = 0.0
    rbm = RBM(n_hidden=16, epochs=20, seed=0, learning_rate=rate, variance_learning_rate=rate,
              batch_size=50)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # roll-back warnings are expected at the high rate
        rbm.fit(X)
    for name in ("weights_", "visible_bias_", "hidden_bias_", "sigma_"):
        assert np.isfinite(getattr(rbm, name)).all()
    assert rbm.sigma_floor * (1 - 1e-5) <= rbm.sigma_.min()
    assert rbm.sigma_.max() <= rbm.sigma_ceiling * (1 + 1e-5)
    assert np.isfinite(rbm.transform(X)).all()


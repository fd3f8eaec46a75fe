"""How tests/data/model_v1*.npz were made: with timbrel at commit e37b1e3, the release
before the model layer became a subpackage (run it there, not on later code).

The audio is librosa.chirp and librosa.tone (reference signals of a general-purpose
library); the model is tiny so the fixture stays a few kilobytes.

    python tests/data/make_model_v1.py WORKDIR
"""

import sys
from pathlib import Path

import librosa
import numpy as np
import soundfile as sf

SR = 8000
OVERRIDES = ["frontend.sample_rate=8000", "frontend.n_mels=12", "frontend.context=1",
             "model.n_hidden=10", "model.epochs=2", "model.seed=3", "model.batch_size=32",
             "training.validation_fraction=0.25"]


def write_audio(folder: Path) -> None:
    folder.mkdir(parents=True, exist_ok=True)
    for i, (f0, f1) in enumerate([(200, 2000), (300, 3000), (3000, 250), (500, 600)]):
        y = librosa.chirp(fmin=f0, fmax=f1, sr=SR, duration=1.0) * 0.5
        y += 0.2 * librosa.tone(440 * (i + 1), sr=SR, duration=1.0)
        sf.write(folder / f"c{i}.wav", y.astype(np.float32), SR)


def probe_signal() -> np.ndarray:
    """The clip whose features the fixture records: a librosa chirp, 150 Hz to 3.5 kHz."""
    return librosa.chirp(fmin=150, fmax=3500, sr=SR, duration=0.5).astype(np.float32)


if __name__ == "__main__":
    from timbrel.cache import build_cache
    from timbrel.config import load_config
    from timbrel.frontend import FrontEnd
    from timbrel.training import load_pipeline, train  # their home at e37b1e3

    work = Path(sys.argv[1])
    write_audio(work / "audio")
    cfg = load_config(None, overrides=OVERRIDES)
    build_cache(work / "audio", work / "cache", config=cfg)
    out = work / "model_v1.npz"
    train(work / "cache", out, config=cfg)
    pipe = load_pipeline(out)
    frames = FrontEnd(pipe.config.frontend).frames(probe_signal(), SR)
    np.savez(work / "model_v1_expected.npz", frames=frames, features=pipe.features(frames))

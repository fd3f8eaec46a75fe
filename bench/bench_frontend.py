"""Front-end benchmark: log-mel frames/s against librosa on the same audio and settings.

librosa.feature.melspectrogram(center=False, power=2) followed by a log is the reference,
timed in alternate rounds after warm-up (median of the per-round ratios); also the
first-call latency of each.

Run: python bench/bench_frontend.py [--seconds 600] [--json out.json]
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _timing import interleaved, median, median_ratio


def main(argv: list[str] | None = None) -> dict:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seconds", type=float, default=600.0)
    parser.add_argument("--rounds", type=int, default=5)
    parser.add_argument("--json", type=Path, default=None)
    args = parser.parse_args(argv)
    t = time.perf_counter()
    from timbrel.frontend import FrontEnd

    fe = FrontEnd()
    y = (0.1 * np.random.default_rng(0).standard_normal(int(16000 * args.seconds))
         ).astype(np.float32)
    fe.frames(y[:16000], 16000)
    first_ours = time.perf_counter() - t
    t = time.perf_counter()
    import librosa

    c = fe.config

    def reference(signal: np.ndarray) -> np.ndarray:
        mel = librosa.feature.melspectrogram(
            y=signal, sr=16000, n_fft=c.fft_length, hop_length=c.hop_length,
            win_length=c.win_length, window=c.window, center=False, power=2.0,
            n_mels=c.n_mels, htk=False, norm="slaney")
        return np.log(mel + c.log_offset)

    reference(y[:16000])
    first_ref = time.perf_counter() - t
    n_frames = fe.n_frames(y.size)
    times = interleaved({"timbrel": lambda: fe.frames(y, 16000),
                         "librosa": lambda: reference(y)}, args.rounds, warm_up=False)
    ours, ref = median(times["timbrel"]), median(times["librosa"])
    ratio = median_ratio(times["librosa"], times["timbrel"])
    result = {"audio_seconds": args.seconds, "frames": n_frames, "rounds": args.rounds,
              "timbrel_frames_per_s": round(n_frames / ours),
              "librosa_frames_per_s": round(n_frames / ref),
              "ratio_vs_librosa": round(ratio, 2), "target_ratio": 1.0,
              "first_call_s": {"timbrel": round(first_ours, 3), "librosa": round(first_ref, 3)}}
    print(f"front end: {n_frames / ours:,.0f} frames/s vs librosa {n_frames / ref:,.0f} "
          f"frames/s = {ratio:.2f}x (target >= 1.0x; median of {args.rounds} alternate "
          f"rounds); first call {first_ours:.2f} s "
          f"(import + one second) vs librosa {first_ref:.2f} s")
    if args.json:
        args.json.write_text(json.dumps(result, indent=1))
    return result


if __name__ == "__main__":
    main(sys.argv[1:])

"""Live features: the stream's throughput and the time one 10 ms block takes.

A model of the default shape (64 bands, context 5, 1024 relu units; random parameters,
since only the time matters) turns a minute of audio into features two ways, in
alternate rounds: the batch path (``Extractor.features`` of the whole signal) and the
stream (``FeatureStream.push`` of 10 ms blocks, then ``flush``). Printed: each one's
realtime factor, their ratio, and the distribution of one push's wall time against
the 10 ms a block lasts (a stream keeps up with live audio while a block takes less
time than it lasts). Once at the model's rate (16 kHz) and once at 44.1 kHz, where the
stream also resamples.

Run: python bench/bench_stream.py [--seconds 60] [--rounds 3] [--json FILE]
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from _timing import interleaved, median, median_ratio, scratch_dir  # noqa: E402

BLOCK_SECONDS = 0.01


def random_model(path: Path) -> Path:
    """A model file of the default shape with random parameters and unit band statistics."""
    from timbrel.config import Config
    from timbrel.model import RBM

    config = Config()
    fe = config.frontend
    rbm = RBM(n_hidden=1024, layout=(fe.n_positions, fe.n_mels), seed=0)
    rbm.initialize(fe.n_visible)
    rbm.weights_ *= np.float32(5.0)  # about as large as trained weights, so units fire
    rbm.save(path, metadata={"config": config.to_dict()},
             arrays={"band_mean": np.full(fe.n_mels, -8.0), "band_scale": np.full(fe.n_mels, 3.0)})
    return path


def measure(extractor, y: np.ndarray, sr: int, rounds: int) -> dict:
    block = round(BLOCK_SECONDS * sr)
    pushes: list[float] = []

    def batch() -> None:
        extractor.features(y, sr)

    def stream() -> None:
        s = extractor.stream(sr)
        for i in range(0, len(y), block):
            began = time.perf_counter()
            s.push(y[i:i + block])
            pushes.append(time.perf_counter() - began)
        s.flush()

    times = interleaved({"batch": batch, "stream": stream}, rounds)
    seconds = len(y) / sr
    push_ms = np.array(pushes) * 1000.0
    return {
        "sample_rate": sr, "audio_seconds": seconds, "block_ms": BLOCK_SECONDS * 1000,
        "batch_realtime": seconds / median(times["batch"]),
        "stream_realtime": seconds / median(times["stream"]),
        "stream_over_batch_speed": median_ratio(times["batch"], times["stream"]),
        "push_ms_median": float(np.median(push_ms)),
        "push_ms_p99": float(np.percentile(push_ms, 99)),
        "push_ms_max": float(push_ms.max()),
        "keeps_up": bool(np.percentile(push_ms, 99) < BLOCK_SECONDS * 1000),
    }


def main(argv: list[str] | None = None) -> dict:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seconds", type=float, default=60.0)
    parser.add_argument("--rounds", type=int, default=3)
    parser.add_argument("--json", type=Path)
    args = parser.parse_args(argv)
    import librosa
    from threadpoolctl import threadpool_limits

    import timbrel

    results: dict = {"runs": []}
    with scratch_dir("timbrel-bench-stream-") as work, threadpool_limits(1):
        extractor = timbrel.load(random_model(work / "model.npz"))
        results["latency_seconds"] = extractor.latency_seconds_
        for sr in (16000, 44100):
            # a librosa chirp with a tone on top, as the export benchmark uses
            y = 0.3 * librosa.chirp(fmin=100, fmax=6000, sr=sr, duration=args.seconds)
            y = (y + 0.1 * librosa.tone(440, sr=sr, duration=args.seconds)).astype(np.float32)
            run = measure(extractor, y, sr, args.rounds)
            results["runs"].append(run)
            print(f"{sr} Hz, {args.seconds:g} s, one BLAS thread: batch "
                  f"{run['batch_realtime']:.0f}x realtime, stream of {run['block_ms']:g} ms blocks "
                  f"{run['stream_realtime']:.0f}x ({run['stream_over_batch_speed']:.2f} of the "
                  f"batch speed); one push {run['push_ms_median']:.3f} ms median, "
                  f"{run['push_ms_p99']:.3f} ms p99, {run['push_ms_max']:.2f} ms max "
                  f"({'keeps up' if run['keeps_up'] else 'FALLS BEHIND'})")
    print(f"latency of a frame's features after its start: "
          f"{results['latency_seconds'] * 1000:.0f} ms (window + context hops)")
    results["keeps_up"] = all(r["keeps_up"] for r in results["runs"])
    if args.json:
        args.json.write_text(json.dumps(results, indent=1))
    return results


if __name__ == "__main__":
    main()

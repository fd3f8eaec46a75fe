"""Export benchmark: end-to-end realtime factor and where the time goes.

Settings (from the export issue): 16 kHz audio, 64 mel bands, context +-5, 1024 relu
hidden units, on this machine's cores. The audio is the demo clips joined into longer
files (content does not change the cost). Prints a table; ``--json PATH`` writes figures.

Run: python bench/bench_export.py [--seconds 600] [--json out.json]
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import soundfile as sf

ROOT = Path(__file__).resolve().parents[1]


def _make_audio(folder: Path, total_seconds: float, file_seconds: float = 60.0) -> list[Path]:
    clips = sorted((ROOT / "demo_audio" / "clips").glob("*.flac"))
    joined = np.concatenate([sf.read(c, dtype="float32")[0] for c in clips])
    paths = []
    n_files = max(1, int(round(total_seconds / file_seconds)))
    per = int(file_seconds * 16000)
    for i in range(n_files):
        start = (i * per) % max(1, joined.size - per)
        y = np.resize(joined[start:], per)
        path = folder / f"long{i:03d}.wav"
        sf.write(path, y, 16000, subtype="PCM_16")
        paths.append(path)
    return paths


def main(argv: list[str] | None = None) -> dict:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seconds", type=float, default=600.0, help="audio to export")
    parser.add_argument("--json", type=Path, default=None)
    args = parser.parse_args(argv)

    from timbrel.audio import read_blocks
    from timbrel.cache import build_cache
    from timbrel.config import load_config
    from timbrel.export import export
    from timbrel.frontend import ContextStacker, FrontEnd
    from timbrel.training import load_pipeline, train

    tmp = Path(tempfile.mkdtemp(prefix="timbrel-bench-"))
    audio = tmp / "audio"
    audio.mkdir()
    paths = _make_audio(audio, args.seconds)
    config = load_config(overrides=["frontend.n_mels=64", "frontend.context=5",
                                    "model.n_hidden=1024", "model.hidden=\"relu\"",
                                    "model.epochs=1", "model.seed=0",
                                    "training.max_frames=20000"])
    build_cache(audio, tmp / "cache", config=config, workers=os.cpu_count())
    train(tmp / "cache", tmp / "model.npz", config=config)
    audio_seconds = len(paths) * 60.0

    t0 = time.perf_counter()
    summary = export(audio, tmp / "model.npz", tmp / "ds", workers=os.cpu_count())
    wall = time.perf_counter() - t0

    # where the time goes: each stage alone on one file, one thread
    from threadpoolctl import threadpool_limits

    pipe = load_pipeline(tmp / "model.npz")
    fe = FrontEnd(pipe.config.frontend)
    stages = {}
    with threadpool_limits(1):
        path = paths[0]
        t = time.perf_counter()
        blocks = list(read_blocks(path, sr=16000))
        stages["decode"] = time.perf_counter() - t
        t = time.perf_counter()
        frames = np.concatenate(list(fe.stream(blocks, 16000)))
        stages["front end"] = time.perf_counter() - t
        t = time.perf_counter()
        stacker = ContextStacker(5)
        rows = stacker.push(pipe.standardise(frames))
        rows = np.concatenate([rows, stacker.finish()])
        feats = pipe.rbm.transform(rows)
        stages["model"] = time.perf_counter() - t
        import pyarrow as pa
        import pyarrow.parquet as pq

        t = time.perf_counter()
        table = pa.table({"features": pa.FixedSizeListArray.from_arrays(
            pa.array(feats.reshape(-1)), feats.shape[1])})
        pq.write_table(table, tmp / "w.parquet", compression="zstd")
        stages["write"] = time.perf_counter() - t
    total = sum(stages.values())
    result = {
        "audio_seconds": audio_seconds, "files": len(paths), "workers": os.cpu_count(),
        "wall_seconds": round(wall, 3), "realtime_factor": round(audio_seconds / wall, 1),
        "frames": summary.n_frames, "target_realtime_factor": 300,
        "stage_share_single_thread": {k: round(v / total, 3) for k, v in stages.items()},
        "stage_seconds_per_audio_minute": {k: round(v, 3) for k, v in stages.items()},
    }
    print(f"export: {audio_seconds:.0f} s of 16 kHz audio in {wall:.1f} s on "
          f"{os.cpu_count()} workers = {audio_seconds / wall:.0f}x realtime (target >= 300x)")
    for k, v in stages.items():
        print(f"  {k:<10} {v / total:6.1%}  ({v:.3f} s per 60 s file, one thread)")
    if args.json:
        args.json.write_text(json.dumps(result, indent=1))
    return result


if __name__ == "__main__":
    main(sys.argv[1:])

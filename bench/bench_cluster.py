"""Cluster and object-store benchmark: frames and export on Dask, from a store and from disk.

The audio is the demo clips joined into 60 s WAV files (``--minutes`` of audio in all).
The cluster is a loopback ``distributed.LocalCluster`` of worker processes (one thread
each); the store is a real S3-compatible server on loopback (moto's server mode, the
one the tests start, ``tests/_s3server.py``), reached through s3fs as a hosted store is.
Every figure is a median over ``--rounds`` rounds of a ratio between two runs timed in
the same round (the machine is shared):

- ``speedup``: wall time with 1 Dask worker over wall time with 2, for ``frames`` (local
  audio to a local cache) and ``export`` (local cache to a local dataset);
- ``store / local``: wall time with the audio, cache, model and dataset all in the store
  over the same run all on local disk, both on the 2-worker cluster. On one machine
  the store costs its HTTP round trips and copies; over a network it costs more.

Run: python bench/bench_cluster.py [--minutes 30] [--rounds 3] [--json out.json]
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
sys.path.insert(0, str(HERE))
sys.path.insert(0, str(ROOT / "tests"))
from _timing import median, median_ratio, scratch_dir  # noqa: E402
from bench_export import make_audio  # noqa: E402

SETTINGS = ["model.epochs=1", "model.seed=0"]
BUCKET = "timbrel-bench"


def _timed(run) -> float:
    began = time.perf_counter()
    run()
    return time.perf_counter() - began


def main(argv: list[str] | None = None) -> dict:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--minutes", type=float, default=30.0)
    parser.add_argument("--rounds", type=int, default=3)
    parser.add_argument("--json", type=Path)
    args = parser.parse_args(argv)

    from distributed import LocalCluster

    import _s3server
    from timbrel.cache import build_cache
    from timbrel.config import load_config
    from timbrel.export import export
    from timbrel.training import train

    config = load_config(overrides=SETTINGS)
    with scratch_dir("timbrel-bench-cluster-") as root, _s3server.start() as env:
        os.environ.update(env)
        os.environ["TIMBREL_STAGING"] = str(root / "staging")
        _s3server.make_bucket(env, BUCKET)
        audio = root / "audio"
        make_audio(audio, max(1, round(args.minutes)))
        _s3server.upload_folder(env, str(audio), f"s3://{BUCKET}/audio")
        build_cache(audio, root / "cache", config=config, workers=2)
        train(root / "cache", root / "model.npz", config=config)
        store_model = f"s3://{BUCKET}/model.npz"
        _s3server.upload_folder(env, str(root / "cache"), f"s3://{BUCKET}/cache")
        with open(root / "model.npz", "rb") as fh:
            _s3server._client(env).put_object(Bucket=BUCKET, Key="model.npz", Body=fh.read())

        times: dict[str, list[float]] = {}
        with LocalCluster(n_workers=1, threads_per_worker=1, processes=True,
                          host="127.0.0.1", dashboard_address=None) as one, \
                LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                             host="127.0.0.1", dashboard_address=None) as two:
            clusters = {"1": one.scheduler_address, "2": two.scheduler_address}
            for r in range(-1, args.rounds):  # round -1 warms the workers up
                runs = {
                    "frames 1 worker": lambda r=r: build_cache(
                        audio, root / f"c1-{r}", config=config, scheduler=clusters["1"]),
                    "frames 2 workers": lambda r=r: build_cache(
                        audio, root / f"c2-{r}", config=config, scheduler=clusters["2"]),
                    "frames store 2 workers": lambda r=r: build_cache(
                        f"s3://{BUCKET}/audio", f"s3://{BUCKET}/c-{r}", config=config,
                        scheduler=clusters["2"]),
                    "export 1 worker": lambda r=r: export(
                        root / "cache", root / "model.npz", root / f"d1-{r}",
                        scheduler=clusters["1"]),
                    "export 2 workers": lambda r=r: export(
                        root / "cache", root / "model.npz", root / f"d2-{r}",
                        scheduler=clusters["2"]),
                    "export store 2 workers": lambda r=r: export(
                        f"s3://{BUCKET}/cache", store_model, f"s3://{BUCKET}/d-{r}",
                        scheduler=clusters["2"]),
                }
                for name, run in runs.items():
                    seconds = _timed(run)
                    if r >= 0:
                        times.setdefault(name, []).append(seconds)

    figures = {"audio_minutes": max(1, round(args.minutes)), "rounds": args.rounds,
               "seconds": {k: median(v) for k, v in times.items()}}
    for stage in ("frames", "export"):
        figures[f"{stage}_speedup"] = median_ratio(times[f"{stage} 1 worker"],
                                                   times[f"{stage} 2 workers"])
        figures[f"{stage}_store_over_local"] = median_ratio(times[f"{stage} store 2 workers"],
                                                            times[f"{stage} 2 workers"])
    print(f"{figures['audio_minutes']} min of audio, median of {args.rounds} rounds")
    for name, seconds in figures["seconds"].items():
        print(f"  {name:<24} {seconds:6.2f} s")
    for stage in ("frames", "export"):
        print(f"{stage}: 2 Dask workers {figures[f'{stage}_speedup']:.2f}x one; store to store "
              f"{figures[f'{stage}_store_over_local']:.2f}x the time of local disk")
    if args.json:
        args.json.write_text(json.dumps(figures, indent=1))
    return figures


if __name__ == "__main__":
    main()

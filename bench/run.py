"""Run every benchmark in bench/ and collect the figures in one JSON file.

Each figure is a ratio against a reference measured in the same run (these machines are
shared and noisy). Run: python bench/run.py --out bench/results.json
"""

from __future__ import annotations

import argparse
import importlib.util
import json
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent
BENCHES = ["bench_startup", "bench_frontend", "bench_training", "bench_export", "bench_scale",
           "bench_stream", "bench_cluster", "bench_probe", "bench_quality"]
# keeps the whole run under about ten minutes on 2 cores (float64 scikit-learn is
# informative only; run bench_training.py alone for it)
EXTRA_ARGS = {"bench_training": ["--repeats", "3", "--no-float64", "--profile"]}


def _load(name: str):
    spec = importlib.util.spec_from_file_location(name, HERE / f"{name}.py")
    module = importlib.util.module_from_spec(spec)
    # registered under its own name, so worker processes can unpickle its functions
    sys.modules[name] = module
    spec.loader.exec_module(module)
    return module


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", type=Path, default=HERE / "results.json")
    parser.add_argument("--only", nargs="*", default=BENCHES)
    args = parser.parse_args()
    results = {}
    for name in args.only:
        if not (HERE / f"{name}.py").is_file():
            print(f"{name}: missing, skipped")
            continue
        print(f"== {name}")
        figures = HERE / f".{name}.json"
        _load(name).main(["--json", str(figures), *EXTRA_ARGS.get(name, [])])
        results[name] = json.loads(figures.read_text())
        figures.unlink()
    args.out.write_text(json.dumps(results, indent=1))
    print(f"figures written to {args.out}")
    print_targets(results)


def _targets(results: dict) -> list[tuple[str, str, str, bool]]:
    """(target, figure, what it is measured against, met) for each benchmark run."""
    rows = []
    if "bench_startup" in results:
        r = results["bench_startup"]
        rows.append(("--help <= +0.4 s over bare python", f"+{r['help_minus_python_s']:.2f} s",
                     "python -c pass, same rounds", r["met"]))
    if "bench_frontend" in results:
        r = results["bench_frontend"]
        rows.append(("front end >= 1.0x librosa", f"{r['ratio_vs_librosa']:.2f}x",
                     "librosa melspectrogram + log", r["ratio_vs_librosa"] >= 1.0))
    if "bench_training" in results and results["bench_training"].get("targets"):
        t = results["bench_training"]["targets"]
        rows.append(("training >= 2x sklearn (640x1024)", f"{t['sklearn_ratio']:.2f}x",
                     "BernoulliRBM float32, same rounds", t["sklearn_ratio_met"]))
        rows.append(("training >= 70% of roofline (640x1024)", f"{t['roofline_share']:.0%}",
                     "5 products alone, same rounds", t["roofline_met"]))
    if "bench_export" in results:
        r = results["bench_export"]
        for name, t in r["targets"].items():
            rows.append((f"export >= {t['target']:.0f}x realtime ({name})",
                         f"{r['realtime_factor']:.0f}x",
                         f"{r['audio_seconds'] / 3600:g} h of audio; stages alone "
                         f"{r['stage_bound_realtime']:.0f}x; --compression none "
                         f"{r['uncompressed']['realtime_factor']:.0f}x", t["met"]))
    if results.get("bench_quality", {}).get("demo_fit_seconds") is not None:
        seconds = results["bench_quality"]["demo_fit_seconds"]
        rows.append(("default fit on the demo < 60 s", f"{seconds:.1f} s",
                     "2 cores, the demo cache", seconds < 60.0))
    if "bench_quality" in results and "test" in results["bench_quality"].get("targets", {}):
        for domain, t in results["bench_quality"]["targets"]["test"].items():
            rows.append((f"quality {domain}: relu ahead of every peer", "yes" if
                         t["ahead_of_every_peer"] else "no",
                         "test split, mean of 3 seeds (validation table beside it)",
                         t["ahead_of_every_peer"]))
            rows.append((f"quality {domain}: relu >= MFCC + 10 points",
                         f"{t['points_over_mfcc']:+.1f}", "test split, mean of 3 seeds",
                         t["ten_points_over_mfcc"]))
    if "bench_stream" in results:
        for r in results["bench_stream"]["runs"]:
            rows.append((f"stream keeps up at {r['sample_rate']} Hz (p99 push < "
                         f"{r['block_ms']:g} ms)", f"{r['push_ms_p99']:.2f} ms",
                         f"{r['stream_realtime']:.0f}x realtime; batch path "
                         f"{r['batch_realtime']:.0f}x, same rounds", r["keeps_up"]))
    if "bench_scale" in results:
        r = results["bench_scale"]
        s = r["speedup"]
        rows.append(("2 workers >= 1.6x one", f"{s['two_workers_speedup']:.2f}x",
                     f"{s.get('audio_minutes')} min of audio ({s.get('audio_minutes_short')} min: "
                     f"{s.get('two_workers_speedup_short')}x); "
                     f"machine's own 2-process {s['machine_reference_speedup']:.2f}x",
                     r["two_workers_met"]))
    if "bench_cluster" in results:
        r = results["bench_cluster"]
        for stage in ("frames", "export"):
            rows.append((f"{stage} on 2 Dask workers faster than on 1",
                         f"{r[f'{stage}_speedup']:.2f}x",
                         f"1 worker, same rounds; store to store "
                         f"{r[f'{stage}_store_over_local']:.2f}x the time of local disk",
                         r[f"{stage}_speedup"] > 1.0))
    if "bench_probe" in results and "runs" in results["bench_probe"]:
        r = results["bench_probe"]
        seeds = f"mean of seeds {','.join(map(str, r['seeds']))}"
        rows.append(("relu probe >= MFCC + 5 points (unseen voices)",
                     f"{r['relu_points_over_mfcc']:+.1f}", f"MFCC with deltas, {seeds}",
                     r["met_over_mfcc"]))
        rows.append(("relu probe > binary hiddens", f"{r['relu_points_over_binary']:+.1f}",
                     f"binary hiddens, {seeds}", r["met_over_binary"]))
    return rows


def print_targets(results: dict) -> None:
    rows = _targets(results)
    if not rows:
        return
    width = max(len(r[0]) for r in rows)
    print(f"\n{'target':<{width}}  {'figure':>8}  {'':6}  reference measured in the same run")
    for target, figure, reference, met in rows:
        print(f"{target:<{width}}  {figure:>8}  {'met' if met else 'MISSED':6}  {reference}")


if __name__ == "__main__":
    sys.exit(main())

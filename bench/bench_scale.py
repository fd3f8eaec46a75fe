"""Scale benchmark: export on 1 and 2 worker processes and a 2-worker Dask cluster, and
how cost and peak memory grow with the number of files, file length and n_hidden.

- ``speed-up``: wall time of 1 local worker over that of 2 local workers, timed in
  alternate rounds on the same files (one hour of audio, 60 files of 60 s) beside the
  machine's own 2-process speed-up on pure products; median ratio (target: 2 workers
  >= 1.6x one). The same on the first ten minutes of those files shows what the
  export's fixed start-up costs a short run. Then, with a 2-worker Dask LocalCluster
  (processes, loopback) started, 1 local worker against the cluster, in alternate
  rounds on the hour. The cluster's start-up is reported apart.
- growth: each point is one export with one worker in a fresh process, so its peak
  RSS (from ``os.wait4``) is that export's alone; the wall time is measured inside the
  process around ``export()``. Linear growth shows as a constant cost per audio
  minute; flat memory as the same peak RSS whatever the file length.

Charts: ``bench/out/scale.png`` (generated, not committed; needs the plot extra).

Run: python bench/bench_scale.py [--json out.json] [--rounds 3]
"""

from __future__ import annotations

import argparse
import json
import logging
import subprocess
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
from _timing import interleaved, median, median_ratio, scratch_dir  # noqa: E402
from bench_export import SETTINGS, link_first, make_audio, make_model  # noqa: E402

TARGET_TWO_WORKERS = 1.6
FILES = (1, 2, 4, 8)             # files of 30 s
LENGTHS = (30.0, 180.0, 360.0, 720.0)  # seconds, one file (a row group holds ~80 s)
HIDDEN = (256, 512, 1024)        # units, 4 files of 30 s
PARALLEL_FILES = 60              # files of 60 s for the speed-ups: one hour
SHORT_FILES = 10                 # the first ten minutes of them, for the fixed cost

# The child reads its peak RSS from /proc (VmHWM, this process's own address space):
# getrusage's ru_maxrss of a child counts the forking parent's size from before exec.
_CHILD = """
import json, resource, sys, time
def peak_mib():
    try:
        with open("/proc/self/status") as fh:
            return next(int(l.split()[1]) for l in fh if l.startswith("VmHWM")) / 1024
    except (OSError, StopIteration):
        return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
from timbrel.export import export
figures = {"import_peak_mib": peak_mib()}
if len(sys.argv) > 1:
    began = time.perf_counter()
    summary = export(sys.argv[1], sys.argv[2], sys.argv[3], workers=1, overwrite=True)
    figures.update(wall=time.perf_counter() - began, frames=summary.n_frames)
figures["peak_mib"] = peak_mib()
print(json.dumps(figures))
"""


def export_in_child(*args: Path) -> dict[str, float]:
    """Wall seconds (inside the process) and peak RSS in MiB of one export in a fresh
    process; with no arguments, of a process that only imports the export stage."""
    result = subprocess.run([sys.executable, "-c", _CHILD, *map(str, args)],
                            stdout=subprocess.PIPE, text=True, check=True)
    figures = json.loads(result.stdout.strip().splitlines()[-1])
    return {"wall_s": figures.get("wall", 0.0), "peak_rss_mib": figures["peak_mib"],
            "frames": figures.get("frames", 0)}


def linear_fit(xs: list[float], ys: list[float]) -> dict[str, float]:
    """Least-squares y = fixed + slope * x, and its R^2 (1 = exactly linear)."""
    import numpy as np

    slope, fixed = np.polyfit(xs, ys, 1)
    predicted = fixed + slope * np.asarray(xs)
    residual = float(np.sum((np.asarray(ys) - predicted) ** 2))
    total = float(np.sum((np.asarray(ys) - np.mean(ys)) ** 2)) or 1.0
    return {"fixed": round(float(fixed), 3), "slope": round(float(slope), 4),
            "r2": round(1.0 - residual / total, 3)}


def _matmul_task(_: int) -> None:
    """The machine's reference workload: single-thread float32 products, no I/O."""
    import numpy as np
    from threadpoolctl import threadpool_limits

    a = np.ones((2000, 704), np.float32)
    w = np.ones((704, 1024), np.float32)
    with threadpool_limits(1):
        for _ in range(6):
            a @ w


def growth(tmp: Path, models: dict[int, Path]) -> dict[str, list[dict]]:
    series: dict[str, list[dict]] = {"files": [], "length": [], "n_hidden": []}
    for n in FILES:
        folder = tmp / f"files{n}"
        make_audio(folder, n, 30.0)
        point = export_in_child(folder, models[1024], tmp / "out")
        series["files"].append({"x": n, "audio_s": 30.0 * n, **point})
    for seconds in LENGTHS:
        folder = tmp / f"length{int(seconds)}"
        make_audio(folder, 1, seconds)
        point = export_in_child(folder, models[1024], tmp / "out")
        series["length"].append({"x": seconds, "audio_s": seconds, **point})
    for n_hidden in HIDDEN:
        point = export_in_child(tmp / "files4", models[n_hidden], tmp / "out")
        series["n_hidden"].append({"x": n_hidden, "audio_s": 120.0, **point})
    for points in series.values():
        for p in points:
            p["seconds_per_audio_minute"] = 60.0 * p["wall_s"] / p["audio_s"]
    return series


def speedups(audio: Path, model: Path, out: Path, rounds: int, short: Path | None = None
             ) -> dict[str, float | None]:
    from timbrel._workers import task_results
    from timbrel.export import export

    def reference(workers: int):
        def run() -> None:
            with task_results(_matmul_task, list(range(10)), workers) as results:
                list(results)
        return run

    def one_worker() -> None:
        export(audio, model, out, workers=1, overwrite=True)

    # local workers first, with no cluster alive: its threads would make the pool start
    # by fork server instead of fork, which is not what `timbrel export -j 2` does
    candidates = {
        "1 worker": one_worker,
        "2 workers": lambda: export(audio, model, out, workers=2, overwrite=True),
        # what the machine gives two processes right now, whatever the code does
        "reference 1 process": reference(1),
        "reference 2 processes": reference(2),
    }
    if short is not None:
        candidates["1 worker, short"] = lambda: export(short, model, out, workers=1,
                                                        overwrite=True)
        candidates["2 workers, short"] = lambda: export(short, model, out, workers=2,
                                                         overwrite=True)
    local = interleaved(candidates, rounds)
    cluster = None
    startup = None
    dask: dict[str, list[float]] = {}
    try:
        import time

        import distributed

        began = time.perf_counter()
        # silence_logs: at close the scheduler can stop before a worker's last heartbeat,
        # which the worker logs as an ERROR with a traceback; the export itself raises
        # on any real failure, so only the shutdown chatter is hidden
        cluster = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                           host="127.0.0.1", dashboard_address=None,
                                           silence_logs=logging.CRITICAL)
        startup = time.perf_counter() - began
        address = cluster.scheduler_address
        dask = interleaved({
            "1 worker beside the cluster": one_worker,
            "dask 2 workers": lambda: export(audio, model, out, scheduler=address,
                                             overwrite=True)}, rounds)
    except ImportError:
        print("  dask extra missing: the Dask figure is skipped")
    finally:
        if cluster is not None:
            cluster.close()
    times = {**local, **dask}
    result: dict[str, float | None] = {
        f"{name}_wall_s": round(median(t), 3) for name, t in times.items()}
    result["two_workers_speedup"] = round(median_ratio(times["1 worker"], times["2 workers"]),
                                          2)
    result["two_workers_speedup_short"] = (
        round(median_ratio(times["1 worker, short"], times["2 workers, short"]), 2)
        if "2 workers, short" in times else None)
    result["machine_reference_speedup"] = round(median_ratio(
        times["reference 1 process"], times["reference 2 processes"]), 2)
    result["dask_speedup"] = (round(median_ratio(times["1 worker beside the cluster"],
                                                 times["dask 2 workers"]), 2)
                              if "dask 2 workers" in times else None)
    result["dask_cluster_startup_s"] = None if startup is None else round(startup, 2)
    return result


def draw(series: dict[str, list[dict]], speed: dict, path: Path) -> bool:
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError:
        print("  matplotlib missing (plot extra): no chart")
        return False
    titles = {"files": "files of 30 s", "length": "length of one file (s)",
              "n_hidden": "hidden units (4 files of 30 s)"}
    fig, axes = plt.subplots(1, 4, figsize=(17, 4), layout="constrained")
    for ax, (name, points) in zip(axes, series.items(), strict=False):
        x = [p["x"] for p in points]
        ax.plot(x, [p["wall_s"] for p in points], "o-", color="C0", label="export wall s")
        ax.set_xlabel(titles[name])
        ax.set_ylabel("wall seconds (one worker)", color="C0")
        ax.set_ylim(bottom=0)
        twin = ax.twinx()
        twin.plot(x, [p["peak_rss_mib"] for p in points], "s--", color="C3", label="peak RSS")
        twin.set_ylabel("peak RSS, MiB", color="C3")
        twin.set_ylim(bottom=0)
        ax.set_title(f"cost against {name.replace('_', ' ')}")
    ax = axes[3]
    labels = ["1 worker", "2 workers", "Dask\n2 workers", "machine\n2 processes"]
    values = [1.0, speed["two_workers_speedup"], speed["dask_speedup"] or 0.0,
              speed["machine_reference_speedup"]]
    ax.bar(labels, values, color=["C7", "C0", "C2", "C8"])
    ax.axhline(TARGET_TWO_WORKERS, color="C3", linestyle=":", label="target 1.6x")
    ax.set_ylabel("speed-up over 1 worker")
    ax.set_title("parallel export, 10 files of 60 s")
    ax.tick_params(axis="x", labelsize=8)
    ax.set_ylim(0, max(2.0, *values) * 1.05)
    ax.legend(loc="upper right")
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=80)
    plt.close(fig)
    return True


def main(argv: list[str] | None = None) -> dict:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rounds", type=int, default=3)
    parser.add_argument("--json", type=Path, default=None)
    parser.add_argument("--chart", type=Path, default=HERE / "out" / "scale.png")
    parser.add_argument("--keep", action="store_true",
                        help="keep the temporary audio, models and exports")
    args = parser.parse_args(argv)

    with scratch_dir("timbrel-scale-", keep=args.keep) as tmp:
        make_audio(tmp / "train", 4, 30.0)
        models = {}
        for n_hidden in HIDDEN:
            overrides = [s for s in SETTINGS if not s.startswith("model.n_hidden")]
            models[n_hidden] = make_model(tmp / f"m{n_hidden}", tmp / "train",
                                          [*overrides, f"model.n_hidden={n_hidden}"])
        parallel = make_audio(tmp / "parallel", PARALLEL_FILES, 60.0)
        link_first(parallel, SHORT_FILES, tmp / "parallel_short")
        speed = speedups(tmp / "parallel", models[1024], tmp / "par", args.rounds,
                         tmp / "parallel_short")
        speed["audio_minutes"], speed["audio_minutes_short"] = PARALLEL_FILES, SHORT_FILES
        series = growth(tmp, models)
        floor = export_in_child()["peak_rss_mib"]

        def spread(points: list[dict], key: str) -> float:
            values = [p[key] for p in points]
            return max(values) / min(values)

        fits = {
            "files": linear_fit([p["audio_s"] / 60 for p in series["files"]],
                                [p["wall_s"] for p in series["files"]]),
            "length": linear_fit([p["audio_s"] / 60 for p in series["length"]],
                                 [p["wall_s"] for p in series["length"]]),
            "n_hidden": linear_fit([p["x"] for p in series["n_hidden"]],
                                   [p["wall_s"] for p in series["n_hidden"]]),
        }

        result = {
            "speedup": speed, "target_two_workers": TARGET_TWO_WORKERS,
            "two_workers_met": speed["two_workers_speedup"] >= TARGET_TWO_WORKERS,
            "growth": series, "import_only_rss_mib": round(floor, 1),
            # wall = fixed + slope * size: R^2 near 1 means linear growth
            "linear_fits": fits,
            "peak_rss_spread_files": round(spread(series["files"], "peak_rss_mib"), 2),
            "peak_rss_spread_length": round(spread(series["length"], "peak_rss_mib"), 2),
            # flat memory: the longest file needs no more than one half as long
            "peak_rss_last_doubling_length": round(series["length"][-1]["peak_rss_mib"]
                                                   / series["length"][-2]["peak_rss_mib"], 3),
        }
        print(f"scale: 2 workers {speed['two_workers_speedup']:.2f}x one on "
              f"{PARALLEL_FILES} min of audio (target >= {TARGET_TWO_WORKERS}x, "
              f"{'met' if result['two_workers_met'] else 'MISSED'}), "
              f"{speed['two_workers_speedup_short']}x on its first {SHORT_FILES} min; "
              f"Dask LocalCluster, 2 workers {speed['dask_speedup']}x one (cluster start-up "
              f"{speed['dask_cluster_startup_s']} s, not counted); the machine's own 2-process "
              f"speed-up on pure matrix products: {speed['machine_reference_speedup']}x; "
              f"median of {args.rounds} rounds")
        for name, points in series.items():
            print(f"  against {name}: " + ", ".join(
                f"{p['x']:g}: {p['seconds_per_audio_minute']:.3f} s/audio-min "
                f"{p['peak_rss_mib']:.0f} MiB" for p in points))
        for name, fit in fits.items():
            unit = "hidden unit" if name == "n_hidden" else "audio minute"
            print(f"  linear fit against {name}: {fit['fixed']:.2f} s fixed + {fit['slope']:.4f} s "
                  f"per {unit}, R^2 {fit['r2']}")
        print(f"  peak RSS largest/smallest: files {result['peak_rss_spread_files']}x, length "
              f"{result['peak_rss_spread_length']}x; {LENGTHS[-1]:.0f} s over {LENGTHS[-2]:.0f} s: "
              f"{result['peak_rss_last_doubling_length']}x (it rises until a clip fills a row "
              f"group, then stays flat; a process that only imports the export stage: "
              f"{floor:.0f} MiB)")
        if draw(series, speed, args.chart):
            result["chart"] = str(args.chart)
            print(f"  chart: {args.chart}")
        if args.json:
            args.json.write_text(json.dumps(result, indent=1))
        return result


if __name__ == "__main__":
    main(sys.argv[1:])

"""Training throughput of timbrel's RBM beside two references measured in the same run.

For each shape (n_visible x n_hidden, minibatch 128, float32) the script measures:

- ``timbrel``: CD-1 frames/s of ``RBM.fit_epoch`` with Gaussian visibles, relu hiddens
  and learned per-band variances (the package's default model);
- ``sklearn``: frames/s of scikit-learn's ``BernoulliRBM.fit`` on the same shapes, fed
  float32 (it then computes in float32) and float64 (its default);
- ``roofline``: frames/s if a minibatch cost only its five matrix products (hidden
  input, visible mean, hidden input, and the two-phase weight gradient, which timbrel
  stacks into one product with twice the inner size), timed alone with numpy here.

The ratios ``timbrel / sklearn`` and ``timbrel / roofline`` are the figures of merit;
absolute numbers depend on the machine and its load. The three are timed in alternate
rounds and each ratio is the median over rounds of the per-round ratio, so a burst of
load from elsewhere hits both sides of one ratio rather than one side of all of them.
``--threads N`` limits BLAS to N threads (default: its own pool size; the kernel and
thread count are printed).  ``--profile`` splits a timbrel
minibatch into the products, the random draws, the parameter-update passes and the
rest, each timed alone at the same shapes.

Usage::

    PYTHONPATH=src python bench/bench_training.py [--json PATH] [--profile] [--repeats 3]
"""

from __future__ import annotations

import argparse
import json
import platform
import sys
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np

from timbrel.model import RBM
from timbrel.model._kernels import standard_normal

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _timing import interleaved, median, median_ratio

BATCH = 128
TARGET_SKLEARN_RATIO = 2.0
TARGET_ROOFLINE_SHARE = 0.70
TARGET_SHAPE = (640, 1024)
DEFAULT_SHAPES = ((64, 256), (640, 1024), (2048, 4096))


def frames_for(n_visible: int, n_hidden: int) -> int:
    """About 0.4 GFLOP·s worth of frames per timing, at least 8 minibatches."""
    per_frame = 10 * n_visible * n_hidden
    batches = max(8, min(400, int(4e10 / (per_frame * BATCH))))
    return batches * BATCH


def best_time(run: Callable[[], object], repeats: int) -> float:
    run()  # warm up: allocations, BLAS threads, caches
    times = []
    for _ in range(repeats):
        began = time.perf_counter()
        run()
        times.append(time.perf_counter() - began)
    return min(times)


def timbrel_run(data: np.ndarray, n_hidden: int) -> Callable[[], None]:
    """One epoch of CD-1 per call (the default model: Gaussian visibles, relu hiddens)."""
    model = RBM(n_hidden=n_hidden, batch_size=BATCH, seed=0, layout=None)
    model.initialize(data.shape[1], visible_mean=data.mean(axis=0))
    batches = [data[i:i + BATCH] for i in range(0, len(data), BATCH)]
    epoch = [0]

    def run() -> None:
        model.fit_epoch(lambda: batches, epoch=epoch[0])
        epoch[0] += 1

    return run


def sklearn_run(data: np.ndarray, n_hidden: int) -> Callable[[], None]:
    from sklearn.neural_network import BernoulliRBM

    # sklearn models binary data; the values only change the sigmoid inputs, not the work
    binary = (data > 0).astype(data.dtype)

    def run() -> None:
        BernoulliRBM(n_components=n_hidden, batch_size=BATCH, n_iter=1,
                     random_state=0).fit(binary)

    return run


def product_buffers(n_visible: int, n_hidden: int) -> dict[str, np.ndarray]:
    rng = np.random.default_rng(0)
    return {
        "weights": rng.standard_normal((n_visible, n_hidden), dtype=np.float32),
        "visible": rng.standard_normal((BATCH, n_visible), dtype=np.float32),
        "hidden": np.empty((BATCH, n_hidden), np.float32),
        "visible_mean": np.empty((BATCH, n_visible), np.float32),
        "vis_stack": rng.standard_normal((2 * BATCH, n_visible), dtype=np.float32),
        "hid_stack": rng.standard_normal((2 * BATCH, n_hidden), dtype=np.float32),
        "grad": np.empty((n_visible, n_hidden), np.float32),
    }


def products_run(n_visible: int, n_hidden: int, n_batches: int) -> Callable[[], None]:
    b = product_buffers(n_visible, n_hidden)
    w = b["weights"]

    def run() -> None:
        for _ in range(n_batches):
            np.matmul(b["visible"], w, out=b["hidden"])
            np.matmul(b["hidden"], w.T, out=b["visible_mean"])
            np.matmul(b["visible_mean"], w, out=b["hidden"])
            np.matmul(b["vis_stack"].T, b["hid_stack"], out=b["grad"])

    return run


def profile_parts(n_visible: int, n_hidden: int, n_batches: int, repeats: int
                  ) -> dict[str, float]:
    """Seconds per minibatch of the pieces of a timbrel CD-1 step, each timed alone."""
    rng = np.random.default_rng(1)
    hidden = np.empty((BATCH, n_hidden), np.float32)
    hidden_scratch = np.empty((BATCH, n_hidden), np.float32)
    visible = np.empty((BATCH, n_visible), np.float32)
    visible_scratch = np.empty(BATCH * n_visible // 2 + 1, np.float32)
    weights = rng.standard_normal((n_visible, n_hidden), dtype=np.float32)
    grad = rng.standard_normal((n_visible, n_hidden), dtype=np.float32)
    velocity = np.zeros_like(weights)

    def draws() -> None:
        for _ in range(n_batches):
            standard_normal(rng, hidden, hidden_scratch)  # rectified-unit noise
            standard_normal(rng, visible, visible_scratch)  # Gaussian visible noise

    def updates() -> None:
        for _ in range(n_batches):
            np.einsum("ij,ij->i", weights, grad)  # z gradient coupling term
            np.multiply(velocity, np.float32(0.9), out=velocity)
            np.add(velocity, grad, out=velocity)
            np.add(weights, velocity, out=weights)

    return {"draws": best_time(draws, repeats) / n_batches,
            "updates": best_time(updates, repeats) / n_batches}


def blas_threads() -> str:
    try:
        from threadpoolctl import threadpool_info
    except ImportError:
        return "unknown"
    pools = [f"{p.get('internal_api')} {p.get('architecture', '?')} kernel x"
             f"{p.get('num_threads')} threads" for p in threadpool_info()
             if p.get("user_api") == "blas"]
    return ", ".join(pools) or "unknown"


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--json", metavar="PATH", help="also write the figures as JSON")
    parser.add_argument("--shapes", default=",".join(f"{v}x{h}" for v, h in DEFAULT_SHAPES),
                        help="comma-separated n_visible x n_hidden (default: %(default)s)")
    parser.add_argument("--repeats", type=int, default=5,
                        help="alternate rounds per shape; median ratio kept")
    parser.add_argument("--threads", type=int, default=None,
                        help="limit BLAS to this many threads (default: its own pool)")
    parser.add_argument("--profile", action="store_true", help="split a minibatch's time")
    parser.add_argument("--no-float64", action="store_true",
                        help="skip scikit-learn on float64 input")
    args = parser.parse_args(argv)
    shapes = [tuple(int(n) for n in item.split("x")) for item in args.shapes.split(",")]

    from threadpoolctl import threadpool_limits

    rows = []
    with threadpool_limits(args.threads):
        print(f"BLAS: {blas_threads()}")
        for n_visible, n_hidden in shapes:
            rows.append(measure_shape(n_visible, n_hidden, args))
            print_row(rows[-1], header=len(rows) == 1)

    target = next((r for r in rows if (r["n_visible"], r["n_hidden"]) == TARGET_SHAPE), None)
    verdict = {}
    if target is not None:
        verdict = {
            "sklearn_ratio_target": TARGET_SKLEARN_RATIO,
            "sklearn_ratio": target["ratio_vs_sklearn_float32"],
            "sklearn_ratio_met": target["ratio_vs_sklearn_float32"] >= TARGET_SKLEARN_RATIO,
            "roofline_target": TARGET_ROOFLINE_SHARE,
            "roofline_share": target["roofline_share"],
            "roofline_met": target["roofline_share"] >= TARGET_ROOFLINE_SHARE,
        }
        print(f"\ntargets at {TARGET_SHAPE[0]}x{TARGET_SHAPE[1]}: "
              f">={TARGET_SKLEARN_RATIO:g}x sklearn (float32): "
              f"{target['ratio_vs_sklearn_float32']:.2f}x "
              f"{'met' if verdict['sklearn_ratio_met'] else 'MISSED'}; "
              f">={TARGET_ROOFLINE_SHARE:.0%} of roofline: {target['roofline_share']:.0%} "
              f"{'met' if verdict['roofline_met'] else 'MISSED'}")
    for row in rows:
        if "profile_ms_per_batch" in row:
            p = row["profile_ms_per_batch"]
            print(f"profile {row['n_visible']}x{row['n_hidden']} (ms/minibatch): "
                  + ", ".join(f"{k} {v:.2f}" for k, v in p.items()))
    if args.json:
        report = {
            "machine": {"python": sys.version.split()[0], "numpy": np.__version__,
                        "platform": platform.platform(), "processor": platform.processor(),
                        "blas_threads": blas_threads()},
            "rows": rows, "targets": verdict,
        }
        with open(args.json, "w", encoding="utf-8") as stream:
            json.dump(report, stream, indent=2)
        print(f"wrote {args.json}")
    return 0


def measure_shape(n_visible: int, n_hidden: int, args: argparse.Namespace) -> dict:
    """Frames/s of timbrel, scikit-learn and the roofline at one shape, and the ratios."""
    n_frames = frames_for(n_visible, n_hidden)
    n_batches = n_frames // BATCH
    data = np.random.default_rng(2).standard_normal((n_frames, n_visible), dtype=np.float32)
    candidates = {"timbrel": timbrel_run(data, n_hidden),
                  "sklearn32": sklearn_run(data, n_hidden),
                  "roofline": products_run(n_visible, n_hidden, n_batches)}
    if not args.no_float64:
        candidates["sklearn64"] = sklearn_run(data.astype(np.float64), n_hidden)
    times = interleaved(candidates, args.repeats)
    ours, sk32, products = (median(times[k]) for k in ("timbrel", "sklearn32", "roofline"))
    sk64 = median(times["sklearn64"]) if "sklearn64" in times else None
    row = {
        "n_visible": n_visible, "n_hidden": n_hidden, "batch": BATCH, "frames": n_frames,
        "rounds": args.repeats,
        "timbrel_fps": n_frames / ours,
        "sklearn_float32_fps": n_frames / sk32,
        "sklearn_float64_fps": None if sk64 is None else n_frames / sk64,
        "roofline_fps": n_frames / products,
        "product_gflops": 10 * BATCH * n_visible * n_hidden * n_batches / products / 1e9,
        "ratio_vs_sklearn_float32": median_ratio(times["sklearn32"], times["timbrel"]),
        "ratio_vs_sklearn_float64": (None if sk64 is None
                                     else median_ratio(times["sklearn64"], times["timbrel"])),
        "roofline_share": median_ratio(times["roofline"], times["timbrel"]),
    }
    if args.profile:
        step = ours / n_batches
        parts = profile_parts(n_visible, n_hidden, n_batches, args.repeats)
        row["profile_ms_per_batch"] = {
            "total": 1e3 * step,
            "products": 1e3 * products / n_batches,
            "random_draws": 1e3 * parts["draws"],
            "update_passes": 1e3 * parts["updates"],
            "other": 1e3 * (step - products / n_batches - parts["draws"] - parts["updates"]),
        }
    return row


def print_row(row: dict, *, header: bool) -> None:
    if header:
        print(f"{'shape':>10} {'timbrel f/s':>12} {'sk f32 f/s':>11} {'sk f64 f/s':>11} "
              f"{'xsk32':>6} {'xsk64':>6} {'roofline f/s':>13} {'share':>6} {'GFLOP/s':>8}")
    sk64 = row["sklearn_float64_fps"]
    ratio64 = row["ratio_vs_sklearn_float64"]
    print(f"{row['n_visible']:>4}x{row['n_hidden']:<5} {row['timbrel_fps']:>12.0f} "
          f"{row['sklearn_float32_fps']:>11.0f} {'-' if sk64 is None else f'{sk64:.0f}':>11} "
          f"{row['ratio_vs_sklearn_float32']:>6.2f} "
          f"{'-' if ratio64 is None else f'{ratio64:.2f}':>6} {row['roofline_fps']:>13.0f} "
          f"{row['roofline_share']:>6.0%} {row['product_gflops']:>8.1f}", flush=True)


if __name__ == "__main__":
    raise SystemExit(main())

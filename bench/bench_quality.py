"""Feature quality on the development suite: the default model against every simple peer.

For each domain of ``bench/domains.py`` (spoken words, instrument notes, drum hits) a
frame cache of the *training* clips alone is built with the default configuration
(or ``--override``s), and per seed two models are trained on it: the default (relu
hiddens) and the same with binary hiddens. Each model exports the training clips with
the held-out clips of a view, and the probe (standardised logistic regression, clips
pooled as the probe pools by default) scores the held-out clips beside its peers:
MFCC+delta, pooled log-mel, and the k-means triangle code (k = the model's hidden
count, fitted on the training clips' windows with the same seed).

Views: ``validation`` (the held-out sources used to choose defaults) and ``test``
(scored once, after choosing). Printed: accuracy per domain and feature set, mean and
spread (min-max) over the seeds, and whether the targets hold (relu ahead of every peer
on every domain, at least 10 points ahead of MFCC, ahead of binary hiddens).

Run: python bench/bench_quality.py [--views validation,test] [--seeds 0,1,2]
     [--domains speech,instruments,drums] [--override KEY=VALUE ...] [--epochs N]
     [--relu-only | --no-binary] [--stack] [--pool mean,max ...] [--no-demo]
     [--json FILE]
"""

from __future__ import annotations

import argparse
import csv
import json
import statistics
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import domains  # noqa: E402
from _timing import scratch_dir  # noqa: E402

PEERS = ("mfcc", "logmel", "kmeans")
TARGET_POINTS_OVER_MFCC = 10.0


def _train_manifest(folder: Path) -> Path:
    """The domain's training clips alone: what the model may learn from."""
    with open(folder / "manifest.csv", newline="", encoding="utf-8") as fh:
        rows = [r for r in csv.DictReader(fh) if r["split"] == "train"]
    path = folder / "manifest_train.csv"
    with open(path, "w", newline="", encoding="utf-8") as fh:
        writer = csv.DictWriter(fh, fieldnames=list(rows[0]), lineterminator="\n")
        writer.writeheader()
        writer.writerows(rows)
    return path


def run_domain(domain: str, views: list[str], seeds: list[int], overrides: list[str],
               work: Path, *, relu_only: bool = False, stack: bool = False,
               no_binary: bool = False, pools: list[str] | None = None,
               choose_by: str | None = None) -> dict:
    from timbrel.cache import build_cache
    from timbrel.config import load_config
    from timbrel.evaluation import probe
    from timbrel.export import export
    from timbrel.training import train

    folder = domains.build(domain)
    view_manifests = domains.views(domain)
    cache = work / domain / "cache"
    build_cache(_train_manifest(folder), cache, config=load_config(overrides=overrides))
    scores: dict[str, dict[str, list[float]]] = {v: {} for v in views}
    choices: dict[str, dict[str, list[str]]] = {v: {} for v in views}
    seconds: list[float] = []
    for seed in seeds:
        for hidden in ("relu",) if relu_only or no_binary else ("relu", "binary"):
            config = load_config(overrides=[*overrides, f'model.hidden="{hidden}"',
                                            f"model.seed={seed}"])
            model = work / domain / f"{hidden}-{seed}.npz"
            began = time.perf_counter()
            train(cache, model, config=config)
            if hidden == "relu":
                seconds.append(time.perf_counter() - began)
            for view in views:
                dataset = work / domain / f"{hidden}-{seed}-{view}"
                export(view_manifests[view], model, dataset, overwrite=True)
                peers = PEERS if hidden == "relu" and not relu_only else ()
                for i, pool in enumerate(pools or [None]):
                    # MFCC and log-mel pool their own way: scored with the first pooling
                    result = probe(dataset, seed=seed, **_pools(pool), choose_by=choose_by,
                                   baselines=[p for p in peers if i == 0 or p == "kmeans"])
                    for score in result.scores:
                        name = f"rbm-{hidden}" if score.name.startswith("rbm") else \
                            score.name.split("-")[0]
                        name = _pooled(name, pool, pools)
                        scores[view].setdefault(name, []).append(score.accuracy)
                        choices[view].setdefault(name, []).append(
                            f"{score.pooling} C={score.c:g}")
            if stack and hidden == "relu":
                _score_stack(cache, model, config, view_manifests, views, seed,
                             work / domain, scores, pools, choose_by)
    return {"scores": scores, "choices": choices, "train_seconds_relu": seconds}


def _score_stack(cache: Path, lower: Path, config, view_manifests: dict, views: list[str],
                 seed: int, work: Path, scores: dict, pools: list[str] | None,
                 choose_by: str | None) -> None:
    """A second layer (same settings) trained on the relu model's activations, scored on
    its own features (``rbm-stack``) and on both layers' side by side (``rbm-stack-all``)."""
    from timbrel.evaluation import probe
    from timbrel.export import export
    from timbrel.training import train

    upper = work / f"stack-{seed}.npz"
    train(cache, upper, config=config, on=lower)
    for view in views:
        for layer, name in (("top", "rbm-stack"), ("all", "rbm-stack-all")):
            dataset = work / f"stack-{seed}-{view}-{layer}"
            export(view_manifests[view], upper, dataset, overwrite=True, layer=layer)
            for pool in pools or [None]:
                result = probe(dataset, baselines=(), seed=seed, **_pools(pool),
                               choose_by=choose_by)
                scores[view].setdefault(_pooled(name, pool, pools),
                                        []).append(result.scores[0].accuracy)


def _pools(pool: str | None) -> dict:
    """The probe's keyword for one ``--pool`` value: learned and k-means features alike."""
    return {} if pool is None else {"pools": tuple(pool.split(","))}


def _pooled(name: str, pool: str | None, pools: list[str] | None) -> str:
    """A score's column: the feature set's name, with its pooling when several are compared
    (the peers that pool their own way, MFCC and log-mel, are the same in each)."""
    return name if not pools or len(pools) == 1 or name in ("mfcc", "logmel") \
        else f"{name}@{pool}"


def demo_fit_seconds(work: Path) -> float:
    """Wall time of the default fit on the demo cache (target: under a minute on 2 cores)."""
    from timbrel.cache import build_cache
    from timbrel.training import train

    build_cache(HERE.parent / "demo_audio" / "manifest.csv", work / "demo-cache")
    began = time.perf_counter()
    train(work / "demo-cache", work / "demo-model.npz")
    return time.perf_counter() - began


def _summary(values: list[float]) -> dict:
    return {"mean": statistics.mean(values), "min": min(values), "max": max(values),
            "values": values}


def table(results: dict, view: str) -> str:
    present = {n for r in results.values() for n in r["scores"][view]}
    order = ("rbm-relu", "rbm-binary", *PEERS, "rbm-stack", "rbm-stack-all")
    names = sorted(present, key=lambda n: (order.index(n.split("@")[0]), n))
    lines = [f"{view} split, accuracy: mean over seeds [min-max]",
             f"{'domain':<12}" + "".join(f"{n:>20}" for n in names)]
    for domain, r in results.items():
        row = r["scores"][view]
        cells = []
        for n in names:
            v = row.get(n, [])
            cells.append(f"{statistics.mean(v):.3f} [{min(v):.3f}-{max(v):.3f}]" if v else "-")
        lines.append(f"{domain:<12}" + "".join(f"{c:>20}" for c in cells))
    return "\n".join(lines)


def targets(results: dict, view: str) -> dict:
    met = {}
    for domain, r in results.items():
        mean = {n: statistics.mean(v) for n, v in r["scores"][view].items()}
        if not all(n in mean for n in ("rbm-binary", *PEERS)):
            continue  # a screening run (--relu-only) has nothing to compare with
        relu = mean["rbm-relu"]
        met[domain] = {
            "ahead_of_every_peer": all(relu > mean[p] for p in PEERS),
            "points_over_mfcc": round(100 * (relu - mean["mfcc"]), 1),
            "ten_points_over_mfcc": 100 * (relu - mean["mfcc"]) >= TARGET_POINTS_OVER_MFCC,
            "ahead_of_binary": relu > mean["rbm-binary"],
        }
    return met


def main(argv: list[str] | None = None) -> dict:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--views", default="validation,test")
    parser.add_argument("--seeds", default="0,1,2")
    parser.add_argument("--domains", default=",".join(domains.DOMAINS))
    parser.add_argument("--override", action="append", default=[], metavar="KEY=VALUE")
    parser.add_argument("--epochs", type=int, default=None, help="shorthand override")
    parser.add_argument("--keep", action="store_true")
    parser.add_argument("--no-demo", action="store_true",
                        help="skip timing the default fit on the demo cache")
    parser.add_argument("--relu-only", action="store_true",
                        help="only the relu models, no binary and no peers (to screen a lever)")
    parser.add_argument("--stack", action="store_true",
                        help="also a second relu layer on each relu model (fit --on)")
    parser.add_argument("--no-binary", action="store_true",
                        help="the relu models and the peers, no binary models")
    parser.add_argument("--pool", action="append", default=None, metavar="P[,P]",
                        help="the probe's pooling of the learned and k-means features "
                             "(default: the probe's own, max); repeat to compare poolings "
                             "on the same models")
    parser.add_argument("--choose-by", default="origin", metavar="COLUMN",
                        help="the probe chooses each feature set's pooling and C by "
                             "cross-validation over this column of the training clips "
                             "(default: origin, the sound's source); '' to use --pool and "
                             "C = 1 instead")
    parser.add_argument("--json", type=Path)
    args = parser.parse_args(argv)
    views = args.views.split(",")
    seeds = [int(s) for s in args.seeds.split(",")]
    overrides = list(args.override) + ([f"model.epochs={args.epochs}"] if args.epochs else [])
    results = {}
    with scratch_dir("timbrel-bench-quality-", keep=args.keep) as work:
        for domain in args.domains.split(","):
            print(domains.describe(domain))
            began = time.perf_counter()
            results[domain] = run_domain(domain, views, seeds, overrides, work,
                                         relu_only=args.relu_only, stack=args.stack,
                                         no_binary=args.no_binary, pools=args.pool,
                                         choose_by=args.choose_by or None)
            print(f"{domain}: {time.perf_counter() - began:.0f} s")
        demo_seconds = None if args.no_demo else demo_fit_seconds(work)
    out = {"overrides": overrides, "pools": args.pool, "choose_by": args.choose_by,
           "seeds": seeds, "domains": results,
           "tables": {}, "targets": {}, "demo_fit_seconds": demo_seconds}
    if demo_seconds is not None:
        print(f"default fit on the demo cache: {demo_seconds:.1f} s (target under 60 s)")
    for view in views:
        print(table(results, view))
        out["tables"][view] = {d: {n: _summary(v) for n, v in r["scores"][view].items()}
                               for d, r in results.items()}
        out["targets"][view] = targets(results, view)
        for domain, t in out["targets"][view].items():
            print(f"  {view} {domain}: relu ahead of every peer {t['ahead_of_every_peer']}, "
                  f"{t['points_over_mfcc']:+.1f} points over MFCC, ahead of binary "
                  f"{t['ahead_of_binary']}")
    if args.json:
        args.json.write_text(json.dumps(out, indent=1))
    return out


if __name__ == "__main__":
    main()

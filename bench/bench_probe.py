"""Probe benchmark: learned features against hand-made ones on real speech, unseen voices.

The spoken-word set of the tests (espeak-ng, Debian: 12 words, 6 training voices, 4 other
voices held out for the test split) is framed with the default configuration. Two models
are trained with the default configuration, once with relu hiddens (the default) and
once with binary hiddens, everything else equal; a probe classifier is trained on the
training voices' clips and scored on the unseen voices' clips, beside MFCC and log-mel
baselines computed from the same audio in the same run.

Targets (from the probe issue): the default relu features at least 5 points of accuracy
ahead of MFCC, and ahead of binary hiddens. Prints a table; ``--json PATH`` writes figures.

Run: python bench/bench_probe.py [--json out.json]
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
SPOKEN_WORDS = ROOT / "tests" / ".cache" / "spoken_words"
TARGET_POINTS_OVER_MFCC = 5.0


def main(argv: list[str] | None = None) -> dict:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--json", type=Path, default=None)
    args = parser.parse_args(argv)

    sys.path.insert(0, str(ROOT / "tests"))
    from speech_corpus import espeak_unavailable_reason, make_spoken_word_set
    from timbrel.cache import build_cache
    from timbrel.config import load_config
    from timbrel.evaluation import probe
    from timbrel.export import export
    from timbrel.training import train

    reason = espeak_unavailable_reason()
    if reason is not None:
        result = {"skipped": f"needs espeak-ng ({reason}); apt-get install espeak-ng"}
        print(f"probe: skipped, {result['skipped']}")
        if args.json:
            args.json.write_text(json.dumps(result, indent=1))
        return result

    manifest = make_spoken_word_set(SPOKEN_WORDS)
    tmp = Path(tempfile.mkdtemp(prefix="timbrel-probe-"))
    build_cache(manifest, tmp / "cache", config=load_config())
    scores: dict[str, dict] = {}
    seconds: dict[str, float] = {}
    for hidden in ("relu", "binary"):
        config = load_config(overrides=[f'model.hidden="{hidden}"'])
        began = time.perf_counter()
        history = train(tmp / "cache", tmp / f"{hidden}.npz", config=config).history
        seconds[hidden] = round(time.perf_counter() - began, 1)
        export(tmp / "cache", tmp / f"{hidden}.npz", tmp / f"{hidden}-ds")
        baselines = ("mfcc", "logmel") if hidden == "relu" else ()
        outcome = probe(tmp / f"{hidden}-ds", baselines=baselines)
        for s in outcome.scores:
            scores[s.name] = {"accuracy": round(s.accuracy, 4), "macro_f1": round(s.macro_f1, 4),
                              "dims": s.n_features}
        scores[f"rbm-{hidden}"]["rollbacks"] = int(sum(h["rollbacks"] for h in history))
        if hidden == "relu":
            n_train, n_test = outcome.n_train, outcome.n_test

    relu, binary, mfcc = (scores[k]["accuracy"] for k in ("rbm-relu", "rbm-binary", "mfcc"))
    over_mfcc = round(100 * (relu - mfcc), 1)
    over_binary = round(100 * (relu - binary), 1)
    result = {
        "clips_train": n_train, "clips_test_unseen_voices": n_test, "scores": scores,
        "train_seconds": seconds, "relu_points_over_mfcc": over_mfcc,
        "relu_points_over_binary": over_binary,
        "target_points_over_mfcc": TARGET_POINTS_OVER_MFCC,
        "met_over_mfcc": over_mfcc >= TARGET_POINTS_OVER_MFCC, "met_over_binary": over_binary > 0,
    }
    print(f"probe on unseen voices: {n_train} training clips, {n_test} test clips (12 words)")
    print(f"  {'features':<12}{'dims':>6}{'accuracy':>10}{'macro-F1':>10}")
    for name, s in scores.items():
        print(f"  {name:<12}{s['dims']:>6}{s['accuracy']:>10.3f}{s['macro_f1']:>10.3f}")
    print(f"relu - mfcc: {over_mfcc:+.1f} points (target >= +{TARGET_POINTS_OVER_MFCC:.0f}: "
          f"{'met' if result['met_over_mfcc'] else 'MISSED'}); relu - binary: "
          f"{over_binary:+.1f} points ({'met' if result['met_over_binary'] else 'MISSED'})")
    if args.json:
        args.json.write_text(json.dumps(result, indent=1))
    return result


if __name__ == "__main__":
    main(sys.argv[1:])

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
BENCHES = ["bench_frontend", "bench_training", "bench_export", "bench_probe"]


def _load(name: str):
    spec = importlib.util.spec_from_file_location(name, HERE / f"{name}.py")
    module = importlib.util.module_from_spec(spec)
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
        _load(name).main(["--json", str(figures)])
        results[name] = json.loads(figures.read_text())
        figures.unlink()
    args.out.write_text(json.dumps(results, indent=1))
    print(f"figures written to {args.out}")


if __name__ == "__main__":
    sys.exit(main())

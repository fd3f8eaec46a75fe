"""Start-up benchmark: ``timbrel --help`` against bare ``python -c pass``.

Both are run as fresh processes, alternately, several rounds; the figure is the median
over rounds of the difference (target: within 0.4 s of bare Python start-up). Also
shown: how long importing the export stage takes, which each command that works on
data pays once.

Run: python bench/bench_startup.py [--rounds 9] [--json out.json]
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _timing import interleaved, median

TARGET_SECONDS = 0.4


def _command(*args: str):
    def run() -> None:
        subprocess.run([sys.executable, *args], check=True, stdout=subprocess.DEVNULL)
    return run


def main(argv: list[str] | None = None) -> dict:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rounds", type=int, default=9)
    parser.add_argument("--json", type=Path, default=None)
    args = parser.parse_args(argv)
    times = interleaved({
        "python": _command("-c", "pass"),
        "help": _command("-m", "timbrel", "--help"),
        "import_export": _command("-c", "import timbrel.export"),
    }, args.rounds)
    extra = [h - p for h, p in zip(times["help"], times["python"], strict=True)]
    result = {
        "rounds": args.rounds,
        "python_s": round(median(times["python"]), 3),
        "help_s": round(median(times["help"]), 3),
        "help_minus_python_s": round(median(extra), 3),
        "import_export_s": round(median(times["import_export"]), 3),
        "target_s": TARGET_SECONDS,
        "met": median(extra) <= TARGET_SECONDS,
    }
    print(f"start-up: timbrel --help {result['help_s']:.2f} s, bare python "
          f"{result['python_s']:.2f} s: +{result['help_minus_python_s']:.2f} s (target "
          f"<= +{TARGET_SECONDS} s, {'met' if result['met'] else 'MISSED'}); importing the "
          f"export stage {result['import_export_s']:.2f} s (median of {args.rounds})")
    if args.json:
        args.json.write_text(json.dumps(result, indent=1))
    return result


if __name__ == "__main__":
    main(sys.argv[1:])

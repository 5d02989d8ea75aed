"""brimline benchmarks: named figures, measured side by side in one process.

Each ``tests/bench/bench_*.py`` module provides ``run(quick: bool) -> dict[str, float]`` and a
``GOALS`` dict of the same keys. Every absolute figure (frames/s, MS/s, us, ms) has a ``*_vs_ref``
companion: its ratio to the shared reference workload of ``reference.py``, timed on the same box
in the same run, interleaved with the measurement. Absolute figures moved about 3x between two
quiet machines; compare the ``*_vs_ref`` figures between boxes. ``reference_us`` is the
reference's own time at the start of the run (how fast the box is; not a goal). Not a timed
test: run it by hand.

Usage::

    python tests/bench/run.py [--quick] [--json] [--only PREFIX]
"""

from __future__ import annotations

import argparse
import importlib.util
import json
import sys
from pathlib import Path

from reference import Reference

HERE = Path(__file__).resolve().parent
REFERENCE_GOAL = "the reference workload (reference.py), lower-quartile us: the box's speed"


def _modules():
    for path in sorted(HERE.glob("bench_*.py")):
        spec = importlib.util.spec_from_file_location(path.stem, path)
        module = importlib.util.module_from_spec(spec)
        spec.loader.exec_module(module)
        yield path.stem, module


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="fewer repetitions (about a minute)")
    parser.add_argument("--json", action="store_true", help="print one JSON object of figures")
    parser.add_argument("--only", default="", help="run only modules whose name has this text")
    args = parser.parse_args(argv)
    ref = Reference()
    ref.sample(30)
    figures: dict[str, float] = {"reference_us": ref.seconds() * 1e6}
    if not args.json:
        print(f"{'reference_us':28s} {figures['reference_us']:14.4g}   {REFERENCE_GOAL}")
    for name, module in _modules():
        if args.only and args.only not in name:
            continue
        result = module.run(quick=args.quick)
        figures.update(result)
        if not args.json:
            for key, value in result.items():
                goal = getattr(module, "GOALS", {}).get(key, "")
                print(f"{key:28s} {value:14.4g}   {goal}")
            sys.stdout.flush()
    if args.json:
        print(json.dumps(figures, sort_keys=True))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

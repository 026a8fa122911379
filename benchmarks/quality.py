"""Detection quality on the labelled corpus: windows detected and missed, false openings per
series-day, re-opens, delays, per shape and overall.

Run: ``python benchmarks/quality.py [--corpus DIR] [--json OUT] [--slack 15m] [--jobs N]``.
Generates the corpus (benchmarks/corpus.py) when the directory lacks ``labels.json``, runs
``streamdet.evaluate`` over every file with the per-file labels and the rules below, and prints
one row per shape (the seeds of a generated shape summed). Not a test: it measures and prints.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import corpus  # noqa: E402

from streamdet.config import parse_duration  # noqa: E402
from streamdet.evaluate import evaluate, load_labels, score_table, total  # noqa: E402

# The rules: default settings everywhere except the step and the Nile's width and relearn
# (as in tests/test_detection.py: the 1898 shift is under 2 standard deviations).
CONFIG = {
    "rules": [
        {"name": "nile", "match": {"metric": "nile"}, "step": "auto", "width": 1.5,
         "relearn_after": "8 steps"},
        {"name": "waterflow", "match": {"metric": "waterflow"}, "step": "auto"},
        {"name": "generated", "step": "5m"},
    ],
}


def shape_of(key_or_stem: str) -> str:
    stem = key_or_stem.split("{", 1)[0]
    base, sep, seed = stem.rpartition("_s")
    return base if sep and seed.isdigit() else stem


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--corpus", default=str(HERE / "corpus"))
    ap.add_argument("--json", help="write overall and per-shape figures as JSON here")
    ap.add_argument("--slack", default="15m")
    ap.add_argument("--jobs", type=int, default=os.cpu_count() or 1)
    args = ap.parse_args()
    root = Path(args.corpus)
    if not (root / "labels.json").exists():
        corpus.generate(root)
    import streamdet

    files = sorted(root.glob("*.csv"))
    labels = load_labels(root / "labels.json")
    started = time.perf_counter()
    ev = evaluate(files, CONFIG, labels, slack=parse_duration(args.slack), jobs=args.jobs,
                  now=time.time())
    seconds = time.perf_counter() - started
    shapes: dict[str, list] = {}
    for key, score in sorted(ev.series[0].items()):
        shapes.setdefault(shape_of(key), []).append(score)
    rows = [(name, total(scores)) for name, scores in shapes.items()]
    overall = ev.overall[0]
    print(f"streamdet from {Path(streamdet.__file__).parent}")
    print(f"corpus {root}: {len(files)} files, {len(ev.series[0])} series, "
          f"{overall.series_days:.0f} series-days; slack {args.slack}; {seconds:.1f} s")
    print(score_table([*rows, ("overall", overall)]))
    generated = total(s for name, s in rows if name not in ("nile", "waterflow"))
    print(score_table([("generated only", generated)]).splitlines()[1])
    if ev.errors:
        per_file: dict[str, list[str]] = {}
        for e in ev.errors:
            per_file.setdefault(Path(e.position.split(" line ")[0]).name, []).append(e.reason)
        print("bad records skipped: " + "; ".join(
            f"{name}: {len(reasons)} (first: {reasons[0]})" for name, reasons in sorted(per_file.items())))
    if ev.unmatched_labels:
        print(f"labels matching nothing: {', '.join(ev.unmatched_labels)}")
    if args.json:
        doc = {"overall": overall.to_dict(), "shapes": {n: s.to_dict() for n, s in rows},
               "series": ev.to_json()["series"]}
        Path(args.json).write_text(json.dumps(doc, indent=1) + "\n")


if __name__ == "__main__":
    main()

"""Print the policy / greedy / walk table for a demo split (test by default), by wording and hop count."""
from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
import time
from pathlib import Path

import hopper
from bench_completion import cpu_model  # scripts/ is on the path when run as a script
from hopper.audit import format_eval

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "factstores" / "supply"


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--store", default=str(ROOT / ".bench" / "demo.duckdb"))
    ap.add_argument("--retrain", action="store_true")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--split", choices=("test", "valid"), default="test",
                    help="valid: the split settings are chosen on (its new wordings are not the test's)")
    ap.add_argument("--members", type=int, default=None,
                    help="policies trained from different seeds that answer together "
                         "(default: the training default, 3)")
    args = ap.parse_args()
    Path(args.store).parent.mkdir(parents=True, exist_ok=True)
    hp = hopper.open_store(args.store)
    t0 = time.monotonic()
    hp.load([DEMO / "facts.csv"])
    load_s = time.monotonic() - t0
    train_s = None
    if args.retrain or hp.info()["policy"] is None:
        t0 = time.monotonic()
        summary = hp.train(DEMO / "questions_train.jsonl", valid=DEMO / "questions_valid.jsonl",
                           seed=args.seed, **({} if args.members is None else {"members": args.members}),
                           log=lambda m: print("  " + m, file=sys.stderr))
        train_s = time.monotonic() - t0
        print(f"training: {summary['epochs']} epochs, {train_s:.0f} s, "
              f"{summary['rollouts_per_second']} rollouts/s, validation Hits@1 {summary['valid_hits1']:.3f}")
    rows = [json.loads(line) for line in (DEMO / f"questions_{args.split}.jsonl").read_text("utf-8").splitlines() if line]
    with tempfile.TemporaryDirectory() as tmp:
        for wording in ("seen", "new"):
            part = Path(tmp) / f"{wording}.jsonl"
            part.write_text("".join(json.dumps(r) + "\n" for r in rows if r["wording"] == wording), "utf-8")
            res = hp.evaluate(part)
            print(f"\n## {args.split} split, {wording} wordings ({res['questions']} questions)")
            print(format_eval(res))
    print(f"\nmachine: {os.cpu_count()} cores, {cpu_model()}; load {load_s:.0f} s")
    print("reproduce: scripts/bench_demo --retrain")
    return 0


if __name__ == "__main__":
    sys.exit(main())

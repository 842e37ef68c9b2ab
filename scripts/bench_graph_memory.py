#!/usr/bin/env python3
"""Peak RSS of the step after a load: the graph's arrays read from a store and its IVF index built, in a fresh process.

Usage: .venv/bin/python scripts/bench_graph_memory.py --store .bench/s1m.duckdb [--code DIR]
  --code: a checkout whose hopper/ to use (e.g. `git archive REV hopper | tar -x -C DIR`), to
  compare two revisions on the same store.  The store is copied to a temporary folder first
  and the step writes its cache there, as after a load (the original store is not touched).
"""
import argparse
import os
import resource
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
CHILD = """
import resource, sys, time
from hopper.env import Graph
from hopper.store import Store
t = time.monotonic()
g = Graph.from_store(Store(sys.argv[1]), build_index=True)
print(f"{g.n_facts} facts, IVF index {'built' if g.ivf is not None else 'not built'}, "
      f"{time.monotonic() - t:.0f} s", flush=True)
"""


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--store", required=True)
    ap.add_argument("--code", default=str(ROOT))
    args = ap.parse_args()
    env = dict(os.environ, PYTHONPATH=str(Path(args.code).resolve()), HF_HUB_OFFLINE="1")
    with tempfile.TemporaryDirectory(dir=Path(args.store).resolve().parent) as tmp:
        copy = Path(tmp) / "store.duckdb"
        shutil.copyfile(args.store, copy)
        out = subprocess.run([sys.executable, "-c", CHILD, str(copy)], env=env, text=True,
                             capture_output=True)
    if out.returncode:
        sys.stderr.write(out.stderr)
        return out.returncode
    peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
    print(f"{args.code}: {out.stdout.strip()}; peak RSS {peak:.0f} MB")
    return 0


if __name__ == "__main__":
    sys.exit(main())

#!/usr/bin/env python3
"""Time one hopper command in fresh processes under two versions of the code, alternately.

The baseline is the package as it was at ``--base`` (a git revision, exported with
``git archive`` to a temporary folder); the other side is the working tree.  Runs alternate
(base, new, base, new, ...) after one unrecorded warm-up of each, so both sides see the
same load on a shared machine; the table gives medians, all runs, and the ratio.

Usage: .venv/bin/python scripts/bench_ab.py [--base main] [--runs 7] [--per N] -- ask ... --store S

``--per N`` divides each time by N (ms per question for a batch of N questions).
``--bytecode`` compiles both sides' modules first (``compileall``, as ``scripts/install``
does); without it, each side runs as found (with PYTHONDONTWRITEBYTECODE=1 set, a tree
without ``__pycache__`` compiles hopper's sources in every process).
Commands that write (``ask`` records runs) write to the store named, under both versions.
"""
from __future__ import annotations

import argparse
import resource
import shlex
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "scripts"))
from bench_completion import cores, cpu_model  # noqa: E402

RUN = "import sys; sys.path.insert(0, sys.argv.pop(1)); from hopper.cli import main; sys.exit(main())"


CPU: dict = {}  # side -> CPU seconds (user + system) of each timed process


def timed(src: str, args: list) -> float:
    env = dict(os.environ, OPENBLAS_NUM_THREADS="1", HF_HUB_OFFLINE="1", TRANSFORMERS_OFFLINE="1")
    r0 = resource.getrusage(resource.RUSAGE_CHILDREN)
    t = time.perf_counter()
    subprocess.run([sys.executable, "-c", RUN, src, *args], cwd=ROOT, env=env, check=True,
                   stdout=subprocess.DEVNULL)
    wall = time.perf_counter() - t
    r1 = resource.getrusage(resource.RUSAGE_CHILDREN)
    CPU.setdefault(src, []).append(r1.ru_utime - r0.ru_utime + r1.ru_stime - r0.ru_stime)
    return wall


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--base", default="main")
    ap.add_argument("--runs", type=int, default=7)
    ap.add_argument("--per", type=int, default=0)
    ap.add_argument("--bytecode", action="store_true")
    ap.add_argument("command", nargs=argparse.REMAINDER)
    a = ap.parse_args()
    cmd = a.command[1:] if a.command[:1] == ["--"] else a.command
    rev = subprocess.run(["git", "rev-parse", "--short", a.base], cwd=ROOT, check=True,
                         capture_output=True, text=True).stdout.strip()
    with tempfile.TemporaryDirectory(prefix="hopper-base-") as tmp:
        archive = subprocess.run(["git", "archive", a.base, "hopper"], cwd=ROOT, check=True,
                                 capture_output=True).stdout
        subprocess.run(["tar", "-x", "-C", tmp], input=archive, check=True)
        sides = {f"base ({a.base} {rev})": tmp, "this tree": str(ROOT)}
        for src in sides.values():
            if a.bytecode:
                subprocess.run([sys.executable, "-m", "compileall", "-q", f"{src}/hopper"], check=True)
        times: dict = {k: [] for k in sides}
        for name, src in sides.items():
            timed(src, cmd)  # warm-up: page cache, compiled bytecode
            CPU[src].clear()
        for _ in range(a.runs):
            for name, src in sides.items():
                times[name].append(timed(src, cmd))
    scale, unit = (1000 / a.per, "ms/question") if a.per else (1.0, "s")
    load = os.getloadavg()
    print(f"| code | median wall, {unit} | median CPU (user+sys), {unit} | wall of each run, {unit} |"
          "\n|---|---|---|---|")
    med = {}
    for (name, ts), src in zip(times.items(), sides.values()):
        med[name] = statistics.median(ts) * scale
        cpu = statistics.median(CPU[src]) * scale
        print(f"| {name} | {med[name]:.3f} | {cpu:.3f} | {', '.join(f'{t * scale:.3f}' for t in ts)} |")
    base, new = med.values()
    print(f"\nratio base/this tree (wall): {base / new:.2f}x; command: hopper {shlex.join(cmd)}")
    print(f"machine: {cores()} cores, {cpu_model()}; load average at the end {load[0]:.1f} "
          f"(1 min), {load[1]:.1f} (5 min)")
    pyc = "compiled first (--bytecode)" if a.bytecode else "as found"
    print(f"bytecode: {pyc}; PYTHONDONTWRITEBYTECODE={os.environ.get('PYTHONDONTWRITEBYTECODE', '')}")
    print(f"reproduce: .venv/bin/python scripts/bench_ab.py --base {a.base} --runs {a.runs}"
          + (f" --per {a.per}" if a.per else "") + (" --bytecode" if a.bytecode else "")
          + " -- " + shlex.join(cmd))
    return 0


if __name__ == "__main__":
    sys.exit(main())

"""Fault bench for the store: does every run land and does every load stay whole?

Each round, on copies of a small store of invented facts in a temporary folder:

  asks      8 concurrent ``hopper ask --strategy walk``: all exit 0 and all 8 runs are listed
            by ``hopper audit --list``.
  kill      ``hopper load`` of a 3,000-row CSV killed with SIGKILL part way; the store must open
            with the old or the complete fact count, and a second run of the load finishes it.
  two-loads two overlapping loads at once: each finishes or fails clearly (exit status not 0, a
            message, no traceback) and the store has exactly the facts of the loads that finished.
  train     ``hopper train`` (8 epochs) killed with SIGKILL after a random number of epochs (0-8)
            plus 0-50 ms; policy v1 must stay active and answer, and ``train --resume`` must
            finish the run as v2 (killed before the first checkpoint: it says clearly that
            there is nothing to resume; killed after v2 was stored: v2 answers and resume
            says the run had finished).

Usage: scripts/bench_faults [--rounds N] [--kill-after LO-HI|spread|write] [--cases ...] [--keep]
``--kill-after`` picks the kill time uniformly in LO..HI seconds (default 1-3: here that lands
in the embedding phase, before the store is written); ``spread`` spreads it over the whole
measured load; ``write`` waits until the load holds the store's write lock, then kills it
0-50 ms later (the all-or-nothing test proper).
"""
from __future__ import annotations

import argparse
import csv
import fcntl
import json
import os
import random
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
HOPPER = ROOT / ".venv" / "bin" / "hopper"

MAKERS = ["Ostrel Works", "Brannock Tooling", "Hask Dunmore", "Quill & Vane", "Ardent Forge"]
TOWNS = ["Quarnby", "Morrowgate", "Thessaly Point", "Lunfield", "Eskerhame"]
PARTS = ["Tarvel pump", "Mirren gasket", "Zolt bracket", "Corran valve", "Pell spindle",
         "Yarrow hinge", "Dask coupling", "Fenn rotor"]


def env() -> dict:
    e = dict(os.environ, HF_HUB_OFFLINE="1", TRANSFORMERS_OFFLINE="1", OPENBLAS_NUM_THREADS="1",
             HOPPER_LOCK_TIMEOUT=os.environ.get("HOPPER_LOCK_TIMEOUT", "120"))
    e.pop("HOPPER_STORE", None)
    return e


def hopper(*args, timeout=600) -> subprocess.CompletedProcess:
    return subprocess.run([str(HOPPER), *map(str, args)], capture_output=True, text=True,
                          env=env(), timeout=timeout)


def write_csv(path: Path, rows) -> None:
    with open(path, "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(["subject", "relation", "object"])
        w.writerows(rows)


def small_facts():
    rows = []
    for i, part in enumerate(PARTS):
        maker = MAKERS[i % len(MAKERS)]
        rows += [(part, "made by", maker), (part, "stored in", TOWNS[(i + 2) % len(TOWNS)])]
    rows += [(m, "based in", TOWNS[i]) for i, m in enumerate(MAKERS)]
    return rows


def bulk_facts(start: int, n: int):
    """Invented catalogue rows: part number k made by / stored in / shipped to a site."""
    rels = ["made by", "stored in", "shipped to"]
    return [(f"Kessel part {k:05d}", rels[k % 3], f"Harl site {k % 97:02d}")
            for k in range(start, start + n)]


def facts(store: Path) -> int:
    p = hopper("info", "--json", "--store", store)
    if p.returncode != 0:
        raise RuntimeError(f"info failed: {p.stderr.strip()[-300:]}")
    return json.loads(p.stdout)["facts"]


def writer_holds(store: Path) -> bool:
    """True while some process holds the store's write lock (hopper's flock beside the store)."""
    try:
        fd = os.open(str(store) + ".lock", os.O_RDONLY)
    except OSError:
        return False
    try:
        fcntl.flock(fd, fcntl.LOCK_SH | fcntl.LOCK_NB)
        return False
    except BlockingIOError:
        return True
    finally:
        os.close(fd)  # closing drops our probe lock at once


def clear_failure(p: subprocess.CompletedProcess) -> bool:
    return p.returncode != 0 and p.stderr.strip() != "" and "Traceback" not in p.stderr


def fresh(base: Path, folder: Path) -> Path:
    folder.mkdir(parents=True)
    shutil.copy(base, folder / "store.duckdb")
    return folder / "store.duckdb"


# -- cases: each returns None when the property held, else why not --------------------------------
def case_asks(store: Path, r: int) -> str | None:
    def ask(i):
        q = f"Where is the company that makes the {PARTS[i % len(PARTS)]} based? (round {r}, asker {i})"
        return subprocess.run([str(HOPPER), "ask", q, "--strategy", "walk", "--json", "--store",
                               str(store)], capture_output=True, text=True, env=env(), timeout=600)

    with ThreadPoolExecutor(8) as pool:
        procs = list(pool.map(ask, range(8)))
    bad = [p for p in procs if p.returncode != 0]
    if bad:
        return f"{len(bad)} of 8 asks failed: {bad[0].stderr.strip().splitlines()[-1][:200]}"
    ids = {json.loads(p.stdout)["run_id"] for p in procs}
    listed = hopper("audit", "--list", "--json", "--limit", "1000", "--store", store)
    if listed.returncode != 0:
        return f"audit --list failed: {listed.stderr.strip()[-200:]}"
    missing = ids - {row["run_id"] for row in json.loads(listed.stdout)}
    if len(ids) != 8 or missing:
        return f"{len(missing)} of {len(ids)} runs not listed"
    return None


def case_kill(store: Path, big: Path, before: int, window, full_time: list) -> tuple[str | None, str]:
    proc = subprocess.Popen([str(HOPPER), "load", str(big), "--store", str(store)],
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True, env=env())
    t0 = time.monotonic()
    if window == "write":
        after = None
        while proc.poll() is None and time.monotonic() - t0 < 600:
            if writer_holds(store):
                time.sleep(random.uniform(0, 0.05))
                after = time.monotonic() - t0
                break
            time.sleep(0.005)
    else:
        lo, hi = (0.5, max(1.0, full_time[0] if full_time else 30.0)) if window == "spread" else window
        after = random.uniform(lo, hi)
    try:
        proc.wait(timeout=max(0.0, t0 + after - time.monotonic()) if after is not None else 0)
        landed = "finished before the kill"
    except subprocess.TimeoutExpired:
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait()
        landed = "killed" + (" in the write phase" if window == "write" else "")
        if Path(str(store) + ".wal").exists():
            landed += ", WAL left"
    after = after if after is not None else time.monotonic() - t0
    n = facts(store)
    complete = before + 3000
    if n not in (before, complete):
        return f"after a kill at {after:.1f} s: {n} facts (old {before}, complete {complete})", landed
    if n == complete:
        landed += ", the load had landed"
    t0 = time.monotonic()
    again = hopper("load", big, "--store", store)
    if again.returncode != 0:
        return f"the second load failed: {again.stderr.strip()[-200:]}", landed
    if n == before:
        full_time.append(time.monotonic() - t0)
        full_time.sort(reverse=True)
    n2 = facts(store)
    if n2 != complete:
        return f"after the second load: {n2} facts, expected {complete}", landed
    return None, landed


def case_two_loads(store: Path, a: Path, b: Path, before: int, sizes: dict) -> tuple[str | None, str]:
    def load(path):
        return subprocess.run([str(HOPPER), "load", str(path), "--store", str(store)],
                              capture_output=True, text=True, env=env(), timeout=900)

    with ThreadPoolExecutor(2) as pool:
        pa, pb = pool.map(load, (a, b))
    ok = {name for name, p in (("a", pa), ("b", pb)) if p.returncode == 0}
    for name, p in (("a", pa), ("b", pb)):
        if p.returncode != 0 and not clear_failure(p):
            return f"load {name} failed unclearly: {p.stderr.strip()[-300:]}", "/".join(sorted(ok))
    expected = before + sizes["".join(sorted(ok))]
    n = facts(store)
    if n != expected:
        return f"{n} facts, expected {expected} with loads {sorted(ok)} finished", "/".join(sorted(ok))
    return None, ("both finished" if len(ok) == 2 else f"only {'/'.join(sorted(ok)) or 'none'} finished")


def write_questions(path: Path) -> None:
    rows = []
    for i, part in enumerate(PARTS):
        maker = MAKERS[i % len(MAKERS)]
        rows.append({"question": f"Who makes the {part}?", "answer": maker})
        rows.append({"question": f"In which town is the maker of the {part} based?",
                     "answer": TOWNS[i % len(MAKERS)]})
    path.write_text("".join(json.dumps(r) + "\n" for r in rows), encoding="utf-8")


def checkpoint_epoch(store: Path) -> int:
    import numpy as np

    try:
        with np.load(str(store) + ".train-checkpoint.npz", allow_pickle=False) as z:
            return int(json.loads(z["meta"].tobytes())["epoch"])
    except (OSError, ValueError, KeyError):
        return 0


def case_train(store: Path, questions: Path, r: int) -> tuple[str | None, str]:
    args = ["--questions", questions, "--epochs", "8", "--seed", str(r), "--members", "1", "--store", store]
    proc = subprocess.Popen([str(HOPPER), "train", *map(str, args)], stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL, env=env())
    target = random.randint(0, 8)
    t0 = time.monotonic()
    while proc.poll() is None and checkpoint_epoch(store) < target and time.monotonic() - t0 < 600:
        time.sleep(0.01)
    time.sleep(random.uniform(0, 0.05))
    if proc.poll() is not None:
        return None, "finished before the kill"
    os.kill(proc.pid, signal.SIGKILL)
    proc.wait()
    at = checkpoint_epoch(store)
    p = hopper("info", "--json", "--store", store)
    if p.returncode != 0:
        return f"info failed after the kill: {p.stderr.strip()[-200:]}", ""
    pol = json.loads(p.stdout)["policy"]
    a = hopper("ask", f"Who makes the {PARTS[r % len(PARTS)]}?", "--json", "--store", store)
    if a.returncode != 0 or json.loads(a.stdout)["policy_version"] != pol["version"]:
        return f"ask after the kill: {a.stderr.strip()[-200:] or a.stdout[:200]}", ""
    again = hopper("train", "--resume", *args)
    if (pol["version"], pol["versions"]) == (2, 2):  # killed after the new policy was stored
        if at and not (again.returncode == 2 and "already finished as policy v2" in again.stderr):
            return f"resume after the run had finished: exit {again.returncode}: {again.stderr[-200:]}", ""
        if not at and again.returncode != 2:
            return f"resume with nothing to resume: exit {again.returncode}", ""
        return None, "killed after the new policy was stored"
    if (pol["version"], pol["versions"]) != (1, 1):
        return f"after the kill the policy is v{pol['version']} of {pol['versions']}", ""
    if at == 0:
        if again.returncode == 2 and "no unfinished training run" in again.stderr:
            return None, "killed before the first checkpoint (resume says so)"
        return f"resume without a checkpoint: exit {again.returncode}: {again.stderr.strip()[-200:]}", ""
    if again.returncode != 0 or "resuming after epoch" not in again.stderr:
        return f"resume failed: exit {again.returncode}: {again.stderr.strip()[-200:]}", ""
    p = hopper("info", "--json", "--store", store)
    pol = json.loads(p.stdout)["policy"]
    if pol["version"] != 2 or Path(str(store) + ".train-checkpoint.npz").exists():
        return f"after resuming: policy v{pol['version']}, checkpoint left behind", ""
    return None, f"killed after epoch {at}, resumed"


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rounds", type=int, default=10)
    ap.add_argument("--kill-after", default="1-3", metavar="LO-HI|spread|write")
    ap.add_argument("--cases", default="asks,kill,two-loads,train")
    ap.add_argument("--keep", action="store_true", help="keep the temporary folder")
    ap.add_argument("--seed", type=int, default=None)
    args = ap.parse_args()
    random.seed(args.seed)
    window = args.kill_after if args.kill_after in ("spread", "write") else tuple(map(float, args.kill_after.split("-")))
    cases = args.cases.split(",")
    if not HOPPER.exists():
        print(f"{HOPPER} is missing: run scripts/install", file=sys.stderr)
        return 2

    tmp = Path(tempfile.mkdtemp(prefix="hopper-faults-"))
    try:
        write_csv(tmp / "small.csv", small_facts())
        big_rows = bulk_facts(0, 3000)
        write_csv(tmp / "big.csv", big_rows)
        a_rows, b_rows = bulk_facts(10000, 800), bulk_facts(10500, 800)  # 300 rows in both
        write_csv(tmp / "a.csv", a_rows)
        write_csv(tmp / "b.csv", b_rows)
        sizes = {"": 0, "a": len(a_rows), "b": len(b_rows), "ab": len(set(a_rows) | set(b_rows))}
        base = tmp / "base.duckdb"
        p = hopper("load", tmp / "small.csv", "--store", base)
        if p.returncode != 0:
            print(f"could not build the small store: {p.stderr.strip()}", file=sys.stderr)
            return 2
        before = facts(base)
        write_questions(tmp / "questions.jsonl")
        if "train" in cases:  # the train case starts from a store with policy v1
            trained = tmp / "trained.duckdb"
            shutil.copy(base, trained)
            p = hopper("train", "--questions", tmp / "questions.jsonl", "--epochs", "1", "--store", trained)
            if p.returncode != 0:
                print(f"could not train the first policy: {p.stderr.strip()}", file=sys.stderr)
                return 2

        stats = {c: {"rounds": 0, "held": 0, "failed": 0, "why": [], "notes": {}} for c in cases}
        full_time: list = []
        for r in range(args.rounds):
            t0 = time.monotonic()
            for c in cases:
                store = fresh(tmp / "trained.duckdb" if c == "train" else base, tmp / f"r{r}-{c}")
                note = ""
                try:
                    if c == "asks":
                        why = case_asks(store, r)
                    elif c == "kill":
                        why, note = case_kill(store, tmp / "big.csv", before, window, full_time)
                    elif c == "two-loads":
                        why, note = case_two_loads(store, tmp / "a.csv", tmp / "b.csv", before, sizes)
                    elif c == "train":
                        why, note = case_train(store, tmp / "questions.jsonl", r)
                    else:
                        raise SystemExit(f"unknown case {c}")
                except Exception as exc:  # noqa: BLE001
                    why = f"{type(exc).__name__}: {exc}"
                s = stats[c]
                s["rounds"] += 1
                s["held" if why is None else "failed"] += 1
                if why:
                    s["why"].append(f"round {r + 1}: {why}")
                if note:
                    s["notes"][note] = s["notes"].get(note, 0) + 1
                if not args.keep:
                    shutil.rmtree(tmp / f"r{r}-{c}", ignore_errors=True)
            print(f"round {r + 1}/{args.rounds} done in {time.monotonic() - t0:.0f} s", file=sys.stderr,
                  flush=True)

        print(f"{'case':<10} {'rounds':>6} {'held':>5} {'failed':>6}  notes")
        for c, s in stats.items():
            notes = "; ".join(f"{k}: {v}" for k, v in sorted(s["notes"].items()))
            print(f"{c:<10} {s['rounds']:>6} {s['held']:>5} {s['failed']:>6}  {notes}")
        for c, s in stats.items():
            for why in s["why"]:
                print(f"  {c}: {why}")
        return 1 if any(s["failed"] for s in stats.values()) else 0
    finally:
        if args.keep:
            print(f"kept {tmp}", file=sys.stderr)
        else:
            shutil.rmtree(tmp, ignore_errors=True)


if __name__ == "__main__":
    sys.exit(main())

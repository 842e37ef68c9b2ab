"""A ``load`` killed with SIGKILL leaves the store as it was (or complete), and a re-run finishes it.

The killed process really dies by SIGKILL; to put the kill at the worst moment every time, a
small driver runs the command line with ``Store.transaction`` wrapped so that the process kills
itself after every row of the load has been inserted but before COMMIT.  The facts are invented.
"""
from __future__ import annotations

import csv
import os
import signal
import subprocess
import sys
import textwrap
from pathlib import Path

import duckdb

REPO = Path(__file__).resolve().parents[1]

# Runs hopper's command line; the write transaction of the load SIGKILLs its own process after
# the work inside it is done and before COMMIT (what a power cut or the OOM killer can do).
DIE_BEFORE_COMMIT = textwrap.dedent("""
    import contextlib, os, signal, sys
    from hopper import store

    @contextlib.contextmanager
    def transaction(self, timeout=None):
        with self.connect(write=True, timeout=timeout) as con:
            con.execute("BEGIN TRANSACTION")
            yield con
            n = con.execute("SELECT count(*) FROM facts").fetchall()[0][0]
            print(f"inserted, {n} facts visible inside the transaction", flush=True)
            os.kill(os.getpid(), signal.SIGKILL)

    store.Store.transaction = transaction
    from hopper.cli import main
    sys.exit(main(sys.argv[1:]))
""")


def _env():
    env = dict(os.environ, HF_HUB_OFFLINE="1", TRANSFORMERS_OFFLINE="1", OPENBLAS_NUM_THREADS="1")
    env.pop("HOPPER_STORE", None)
    return env


def write_csv(path: Path, rows) -> Path:
    with open(path, "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(["subject", "relation", "object"])
        w.writerows(rows)
    return path


def catalogue(start: int, n: int):
    rels = ["made by", "stored in", "shipped to"]
    return [(f"Kessel part {k:05d}", rels[k % 3], f"Harl site {k % 37:02d}") for k in range(start, start + n)]


def load_here(store: Path, csv_path: Path) -> dict:
    """A load in this process (its encoder stays loaded between tests)."""
    import hopper as hp

    return hp.open_store(store).load([csv_path], progress=False)


def counts(store: Path) -> tuple:
    con = duckdb.connect(str(store), read_only=True)
    try:
        return con.execute("SELECT (SELECT count(*) FROM facts), (SELECT count(*) FROM fact_vectors), "
                           "(SELECT count(*) FROM entities), (SELECT count(*) FROM loads), "
                           "(SELECT value FROM meta WHERE key = 'facts_version')").fetchall()[0]
    finally:
        con.close()


def killed_load(store: Path, csv_path: Path) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-c", DIE_BEFORE_COMMIT, "load", str(csv_path),
                           "--store", str(store)], capture_output=True, text=True, env=_env(),
                          cwd=REPO, timeout=300)


def test_load_killed_before_commit_leaves_the_store_as_it_was_and_a_rerun_finishes(tmp_path):
    store = tmp_path / "store.duckdb"
    load_here(store, write_csv(tmp_path / "first.csv", catalogue(0, 200)))
    before = counts(store)
    assert before[:2] == (200, 200)

    more = write_csv(tmp_path / "more.csv", catalogue(150, 400))  # 50 known, 350 new
    proc = killed_load(store, more)
    assert proc.returncode == -signal.SIGKILL, proc.stderr
    assert "inserted, 550 facts visible inside the transaction" in proc.stdout  # killed half-way
    assert counts(store) == before  # nothing of the killed load is visible
    assert load_here(store, more)["facts_added"] == 350  # the re-run adds what was missing
    facts, vectors, _, loads, version = counts(store)
    assert (facts, vectors, loads, version) == (550, 550, 2, "2")


def test_first_load_killed_leaves_no_facts_and_a_rerun_finishes(tmp_path):
    """A store the killed load was creating is left empty (its tables, no facts), never half full."""
    store = tmp_path / "new.duckdb"
    rows = write_csv(tmp_path / "rows.csv", catalogue(0, 120))
    proc = killed_load(store, rows)
    assert proc.returncode == -signal.SIGKILL, proc.stderr
    assert counts(store)[:4] == (0, 0, 0, 0)
    load_here(store, rows)
    assert counts(store)[:2] == (120, 120)


def test_load_killed_from_outside_while_it_holds_the_write_lock(tmp_path):
    """The kill comes from another process 10 ms after the load is seen holding the store's
    write lock (hopper's flock on ``STORE.lock``): the store keeps the old facts or all of the
    new ones, and a re-run completes it.  (``scripts/bench_faults --kill-after write`` repeats
    this with random delays.)"""
    import fcntl
    import time

    store = tmp_path / "store.duckdb"
    load_here(store, write_csv(tmp_path / "a.csv", catalogue(0, 100)))
    big = write_csv(tmp_path / "b.csv", catalogue(1000, 300))
    proc = subprocess.Popen([sys.executable, "-m", "hopper.cli", "load", str(big), "--store", str(store)],
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, env=_env(), cwd=REPO)
    lock = str(store) + ".lock"
    held = False
    while proc.poll() is None and not held:
        fd = os.open(lock, os.O_RDONLY)
        try:
            fcntl.flock(fd, fcntl.LOCK_SH | fcntl.LOCK_NB)
        except BlockingIOError:
            held = True
        finally:
            os.close(fd)
        if not held:
            time.sleep(0.002)
    assert held, "the load finished before it was seen holding the lock"
    time.sleep(0.01)
    os.kill(proc.pid, signal.SIGKILL)
    proc.wait()
    n = counts(store)[0]
    assert n in (100, 400), n
    assert counts(store)[1] == n  # every fact has its vector
    load_here(store, big)
    assert counts(store)[:2] == (400, 400)

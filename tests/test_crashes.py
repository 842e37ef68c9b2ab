"""A ``load`` killed with SIGKILL leaves the store as it was (or complete), and a re-run finishes it.

The killed process really dies by SIGKILL; to put the kill at the worst moment every time, a
small driver runs the command line with ``Store.transaction`` wrapped so that the process kills
itself after every row of the load has been inserted but before COMMIT.  The facts are invented.
"""
from __future__ import annotations

import fcntl
import os
import signal
import subprocess
import sys
from pathlib import Path

import pytest

from helpers import REPO, catalogue, cli_driver, hopper_env, query, write_csv

# Runs hopper's command line; the write transaction of the load SIGKILLs its own process after
# the work inside it is done and before COMMIT (what a power cut or the OOM killer can do).
DIE_BEFORE_COMMIT = cli_driver("""
    import contextlib, os, signal
    from hopper import store

    @contextlib.contextmanager
    def transaction(self, timeout=None, **kw):
        with self.connect(write=True, timeout=timeout) as con:
            con.execute("BEGIN TRANSACTION")
            yield con
            n = con.execute("SELECT count(*) FROM facts").fetchall()[0][0]
            print(f"inserted, {n} facts visible inside the transaction", flush=True)
            os.kill(os.getpid(), signal.SIGKILL)

    store.Store.transaction = transaction
""")

# Runs hopper's command line; the load's write transaction says on stdout that it holds the
# store's write lock, at the point named by $PAUSE_AT ("begin": before the load's inserts,
# "commit": after them, before COMMIT), and waits there until its stdin closes.
PAUSE_IN_WRITE = cli_driver("""
    import contextlib, os, sys
    from hopper import store

    real = store.Store.transaction

    def pause(where):
        if os.environ["PAUSE_AT"] == where:
            print(f"holding the write lock at {where}", flush=True)
            sys.stdin.read()

    @contextlib.contextmanager
    def transaction(self, timeout=None, **kw):
        with real(self, timeout=timeout, **kw) as con:
            pause("begin")
            yield con
            pause("commit")

    store.Store.transaction = transaction
""")


def load_here(store: Path, csv_path: Path) -> dict:
    """A load in this process (its encoder stays loaded between tests)."""
    import hopper as hp

    return hp.open_store(store).load([csv_path], progress=False)


def counts(store: Path) -> tuple:
    return query(store, "SELECT (SELECT count(*) FROM facts), (SELECT count(*) FROM fact_vectors), "
                        "(SELECT count(*) FROM entities), (SELECT count(*) FROM loads), "
                        "(SELECT value FROM meta WHERE key = 'facts_version')")[0]


def killed_load(store: Path, csv_path: Path) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-c", DIE_BEFORE_COMMIT, "load", str(csv_path),
                           "--store", str(store)], capture_output=True, text=True, env=hopper_env(),
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


def write_lock_held(store: Path) -> bool:
    """Whether a process holds the store's write lock (hopper's flock on ``STORE.lock``),
    probed without waiting."""
    fd = os.open(str(store) + ".lock", os.O_RDONLY)
    try:
        fcntl.flock(fd, fcntl.LOCK_SH | fcntl.LOCK_NB)
    except BlockingIOError:
        return True
    finally:
        os.close(fd)  # closing lets go of a shared lock we got
    return False


@pytest.mark.parametrize("pause_at", ["begin", "commit"])
def test_load_killed_from_outside_while_it_holds_the_write_lock(tmp_path, pause_at):
    """SIGKILL from another process while the load holds the store's write lock, before its
    inserts ("begin") or after them and before COMMIT ("commit"): the store keeps the old
    facts, and a re-run completes it.  The load says when it holds the lock and waits there,
    so the kill lands inside the write however slow the machine; ``scripts/bench_faults
    --kill-after write`` repeats the case with random delays."""
    store = tmp_path / "store.duckdb"
    load_here(store, write_csv(tmp_path / "a.csv", catalogue(0, 100)))
    before = counts(store)
    big = write_csv(tmp_path / "b.csv", catalogue(1000, 300))
    proc = subprocess.Popen([sys.executable, "-c", PAUSE_IN_WRITE, "load", str(big), "--store", str(store)],
                            stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            env=hopper_env(PAUSE_AT=pause_at), cwd=REPO)
    try:
        line = proc.stdout.readline()  # blocks until the load is inside its write (or exits)
        assert line == f"holding the write lock at {pause_at}\n", proc.stderr.read() if not line else line
        assert write_lock_held(store)
        os.kill(proc.pid, signal.SIGKILL)
        assert proc.wait(timeout=60) == -signal.SIGKILL
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert counts(store) == before  # facts, vectors, entities, loads and version as they were
    assert not write_lock_held(store)  # the kernel let go of the dead process's lock
    assert load_here(store, big)["facts_added"] == 300
    assert counts(store)[:2] == (400, 400)

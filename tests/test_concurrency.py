"""Recording under DuckDB's one-writer rule: concurrent ``hopper ask`` processes, and an ask while another process holds the store."""

import json
import subprocess
import sys
import textwrap
import time

import pytest

import hopper
from helpers import REPO, catalogue, cli_driver, hopper_cmd, hopper_env, query, write_csv

FACTS = [
    ("Tarvel pump", "made by", "Ostrel Works"), ("Ostrel Works", "based in", "Quarnby"),
    ("Mirren gasket", "made by", "Brannock Tooling"), ("Brannock Tooling", "based in", "Morrowgate"),
    ("Zolt bracket", "made by", "Hask Dunmore"), ("Hask Dunmore", "based in", "Thessaly Point"),
    ("Tarvel pump", "stored in", "Lunfield"), ("Mirren gasket", "stored in", "Eskerhame"),
]
PARTS = ["Tarvel pump", "Mirren gasket", "Zolt bracket"]


def _env(**extra):
    return hopper_env(HOPPER_LOCK_TIMEOUT="60", **extra)


@pytest.fixture()
def store(tmp_path):
    hp = hopper.open_store(tmp_path / "store.duckdb")
    hp.load([write_csv(tmp_path / "facts.csv", FACTS)], progress=False)
    return hp.path


def _listed(store) -> set:
    proc = subprocess.run(hopper_cmd("audit", "--list", "--json", "--limit", "1000", "--store", str(store)),
                          capture_output=True, text=True, env=_env(), cwd=REPO, timeout=120)
    assert proc.returncode == 0, proc.stderr
    return {r["run_id"] for r in json.loads(proc.stdout)}


def test_eight_concurrent_asks_all_recorded(store):
    procs = []
    for i in range(8):
        q = f"Where is the company that makes the {PARTS[i % 3]} based? (asker {i})"
        procs.append(subprocess.Popen(hopper_cmd("ask", q, "--strategy", "walk", "--json", "--store", str(store)),
                                      stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                                      env=_env(), cwd=REPO))
    run_ids = []
    for p in procs:
        out, err = p.communicate(timeout=180)
        assert p.returncode == 0, err
        doc = json.loads(out)
        assert doc["fetches"], doc
        run_ids.append(doc["run_id"])
    assert len(set(run_ids)) == 8
    assert set(run_ids) <= _listed(store)


# Holds the store the way a client that ignores hopper's lock files would (DuckDB's own file
# lock, a transaction open) until its stdin closes.
HOLDER = textwrap.dedent("""
    import sys, duckdb
    con = duckdb.connect(sys.argv[1])          # read-write: the file lock is ours until close
    con.execute("BEGIN TRANSACTION")
    con.execute("INSERT INTO meta VALUES (?, ?)", ["lock-test", "held"])
    print("locked", flush=True)
    sys.stdin.read()
    con.execute("ROLLBACK")
    con.close()
    print("released", flush=True)
""")


def hold_store(store):
    """A process holding ``store`` until its stdin is closed; returned once it holds it."""
    holder = subprocess.Popen([sys.executable, "-c", HOLDER, str(store)], stdin=subprocess.PIPE,
                              stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=_env())
    line = holder.stdout.readline()
    assert line == "locked\n", holder.stderr.read()
    return holder


# Runs hopper's command line and creates the file $REFUSED_MARK the first time DuckDB refuses
# to open the store because another process holds its lock (hopper then waits and retries).
MARK_REFUSALS = cli_driver("""
    import os
    from hopper import store

    real = store._is_lock_error

    def is_lock_error(exc):
        found = real(exc)
        if found:
            open(os.environ["REFUSED_MARK"], "a").close()
        return found

    store._is_lock_error = is_lock_error
""")


def wait_for(condition, what: str, timeout: float = 120.0, proc=None) -> None:
    """Poll ``condition`` every 20 ms until it holds; fail after ``timeout`` s or if ``proc`` exits."""
    deadline = time.monotonic() + timeout
    while not condition():
        assert proc is None or proc.poll() is None, f"the process exited before {what}: {proc.stderr.read()}"
        assert time.monotonic() < deadline, f"no {what} within {timeout:.0f} s"
        time.sleep(0.02)


def test_ask_waits_for_another_writer(store, tmp_path):
    """An ask started while another process holds the store is refused by DuckDB, waits, and
    answers (and is recorded) once the holder lets go: the ask marks its first refusal, the
    test sees the ask still running past it, and only then releases the store."""
    refused = tmp_path / "refused"
    holder = hold_store(store)
    try:
        proc = subprocess.Popen([sys.executable, "-c", MARK_REFUSALS, "ask", "Who makes the Zolt bracket?",
                                 "--strategy", "walk", "--json", "--store", str(store)],
                                stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                                env=_env(REFUSED_MARK=str(refused)), cwd=REPO)
        wait_for(refused.exists, "refusal by the held store", proc=proc)
        assert proc.poll() is None, "the ask ended while the store was held"
        assert holder.poll() is None
    finally:
        holder.stdin.close()  # let go
        holder.wait(timeout=60)
    assert holder.returncode == 0 and holder.stdout.read() == "released\n"
    out, err = proc.communicate(timeout=120)
    assert proc.returncode == 0, err
    doc = json.loads(out)
    assert doc["start_entities"] == ["Zolt bracket"] and doc["fetches"], doc
    assert doc["run_id"] in _listed(store)
    assert hopper.open_store(store).info()["runs"] == 1


# Runs hopper's command line, appending to the file $MARKS one line "NAME EVENT TIME" (monotonic
# clock, which every process on the machine shares) when the process starts, when its write
# transaction holds the write lock ("write" events, before the load's inserts and before COMMIT),
# and when it ends.  At the start it waits until every name in $PEERS has started, so the
# processes are certain to run at the same time however the machine schedules them.
MARK_TIMES = cli_driver("""
    import atexit, contextlib, os, time
    from hopper import store

    name, marks = os.environ["NAME"], os.environ["MARKS"]

    def mark(event):
        with open(marks, "a") as fh:
            fh.write(f"{name} {event} {time.monotonic():.6f}\\n")

    def started():
        with open(marks) as fh:
            return {line.split()[0] for line in fh if line.split()[1] == "start"}

    mark("start")
    deadline = time.monotonic() + 120
    while not set(os.environ["PEERS"].split()) <= started() and time.monotonic() < deadline:
        time.sleep(0.01)
    atexit.register(mark, "end")
    real = store.Store.transaction

    @contextlib.contextmanager
    def transaction(self, timeout=None, **kw):
        with real(self, timeout=timeout, **kw) as con:
            mark("write-begin")
            yield con
            mark("write-end")  # still inside the lock: COMMIT comes after

    store.Store.transaction = transaction
""")


def test_two_loads_at_once_both_land_and_nothing_is_lost(store):
    """Two loads running at the same time (each records when it started, wrote and ended): their
    writes take turns, the later one skips what the earlier stored, and the store ends with
    exactly the union of the facts (each once, each with its vector)."""
    a_rows, b_rows = catalogue(0, 150), catalogue(100, 150)  # 50 rows in both
    marks = store.parent / "marks.txt"
    marks.touch()
    procs = {}
    for name, rows in (("a", a_rows), ("b", b_rows)):
        f = write_csv(store.parent / f"{name}.csv", rows)
        procs[name] = subprocess.Popen([sys.executable, "-c", MARK_TIMES, "load", str(f), "--json",
                                        "--store", str(store)], stdout=subprocess.PIPE,
                                       stderr=subprocess.PIPE, text=True, cwd=REPO,
                                       env=_env(NAME=name, MARKS=str(marks), PEERS="a b"))
    reports = {}
    for name, p in procs.items():
        out, err = p.communicate(timeout=300)
        assert p.returncode == 0, err
        reports[name] = json.loads(out)
    t = {}
    for line in marks.read_text().splitlines():
        name, event, when = line.split()
        t[name, event] = float(when)
    assert len(t) == 8, t  # start, write-begin, write-end, end for each
    first, later = sorted("ab", key=lambda n: t[n, "write-begin"])
    # the two processes ran at the same time, each started before the other's write
    assert max(t["a", "start"], t["b", "start"]) < min(t["a", "write-begin"], t["b", "write-begin"])
    assert max(t["a", "start"], t["b", "start"]) < min(t["a", "end"], t["b", "end"])
    # their writes did not: the later one got the lock only after the first had finished
    assert t[first, "write-end"] < t[later, "write-begin"]
    # the later one saw what the first stored and skipped the overlap
    assert reports[first]["facts_added"] == 150 and reports[later]["facts_added"] == 100
    got = set(query(store, "SELECT subject, relation, object FROM facts"))
    n, n_vec, n_loads = query(store, "SELECT (SELECT count(*) FROM facts), (SELECT count(*) FROM "
                                     "fact_vectors), (SELECT count(*) FROM loads)")[0]
    assert got == set(FACTS) | set(a_rows) | set(b_rows)
    assert n == n_vec == len(FACTS) + 250 and n_loads == 3


def test_load_that_cannot_get_the_store_fails_clearly_and_changes_nothing(store):
    """With another process holding the store past HOPPER_LOCK_TIMEOUT, a load gives up: exit
    status 1, one line saying why and what to do, and the store has what it had."""
    more = write_csv(store.parent / "more.csv", catalogue(500, 20))
    holder = hold_store(store)  # held until the load has given up, however long that takes
    try:
        proc = subprocess.run(hopper_cmd("load", more, "--store", store), capture_output=True, text=True,
                              env=hopper_env(HOPPER_LOCK_TIMEOUT="2"), cwd=REPO, timeout=300)
        assert holder.poll() is None
    finally:
        holder.stdin.close()
        holder.wait(timeout=60)
    assert proc.returncode == 1 and proc.stdout == ""
    assert proc.stderr.count("\n") == 1 and "Traceback" not in proc.stderr, proc.stderr
    assert "held the store for too long" in proc.stderr and "HOPPER_LOCK_TIMEOUT" in proc.stderr
    assert hopper.open_store(store).info()["facts"] == len(FACTS)

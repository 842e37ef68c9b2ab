"""Recording under DuckDB's one-writer rule: concurrent ``hopper ask`` processes, and an ask while another process holds the store."""

import csv
import json
import os
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import pytest

import hopper
from test_crashes import catalogue, write_csv

REPO = Path(__file__).resolve().parents[1]
FACTS = [
    ("Tarvel pump", "made by", "Ostrel Works"), ("Ostrel Works", "based in", "Quarnby"),
    ("Mirren gasket", "made by", "Brannock Tooling"), ("Brannock Tooling", "based in", "Morrowgate"),
    ("Zolt bracket", "made by", "Hask Dunmore"), ("Hask Dunmore", "based in", "Thessaly Point"),
    ("Tarvel pump", "stored in", "Lunfield"), ("Mirren gasket", "stored in", "Eskerhame"),
]
PARTS = ["Tarvel pump", "Mirren gasket", "Zolt bracket"]


def _env():
    env = dict(os.environ, HF_HUB_OFFLINE="1", TRANSFORMERS_OFFLINE="1", HOPPER_LOCK_TIMEOUT="60")
    env.pop("HOPPER_STORE", None)
    return env


def _hopper(*args):
    return [sys.executable, "-m", "hopper.cli", *args]


@pytest.fixture()
def store(tmp_path):
    path = tmp_path / "facts.csv"
    with open(path, "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(["subject", "relation", "object"])
        w.writerows(FACTS)
    hp = hopper.open_store(tmp_path / "store.duckdb")
    hp.load([path], progress=False)
    return hp.path


def _listed(store) -> set:
    proc = subprocess.run(_hopper("audit", "--list", "--json", "--limit", "1000", "--store", str(store)),
                          capture_output=True, text=True, env=_env(), cwd=REPO, timeout=120)
    assert proc.returncode == 0, proc.stderr
    return {r["run_id"] for r in json.loads(proc.stdout)}


def test_eight_concurrent_asks_all_recorded(store):
    procs = []
    for i in range(8):
        q = f"Where is the company that makes the {PARTS[i % 3]} based? (asker {i})"
        procs.append(subprocess.Popen(_hopper("ask", q, "--strategy", "walk", "--json", "--store", str(store)),
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


HOLDER = textwrap.dedent("""
    import sys, time, duckdb
    con = duckdb.connect(sys.argv[1])          # read-write: the file lock is ours until close
    con.execute("BEGIN TRANSACTION")
    con.execute("INSERT INTO meta VALUES (?, ?)", ["lock-test", "held"])
    print("locked", flush=True)
    time.sleep(float(sys.argv[2]))
    con.execute("ROLLBACK")
    con.close()
    print("released", flush=True)
""")


def test_ask_waits_for_another_writer(store):
    hold = 2.0
    holder = subprocess.Popen([sys.executable, "-c", HOLDER, str(store), str(hold)],
                              stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=_env())
    assert holder.stdout.readline().strip() == "locked", holder.stderr.read()
    t0 = time.monotonic()
    proc = subprocess.Popen(_hopper("ask", "Who makes the Zolt bracket?", "--strategy", "walk", "--json",
                                    "--store", str(store)),
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=_env(), cwd=REPO)
    assert holder.poll() is None, "the holder let go before the ask started"
    out, err = proc.communicate(timeout=120)
    waited = time.monotonic() - t0
    holder.communicate(timeout=30)
    assert holder.returncode == 0
    assert proc.returncode == 0, err
    doc = json.loads(out)
    # the ask could not open the store at all until the holder let go
    assert waited >= hold * 0.5, f"ask finished in {waited:.2f} s while the store was held for {hold} s"
    assert doc["run_id"] in _listed(store)
    info = hopper.open_store(store).info()
    assert info["runs"] == 1


def test_two_loads_at_once_both_land_and_nothing_is_lost(store):
    """Two overlapping loads started together: one waits for the other's write; the store ends
    with exactly the union of the facts (each once, each with its vector)."""
    import duckdb

    a_rows, b_rows = catalogue(0, 150), catalogue(100, 150)  # 50 rows in both
    a = write_csv(store.parent / "a.csv", a_rows)
    b = write_csv(store.parent / "b.csv", b_rows)
    procs = [subprocess.Popen(_hopper("load", f, "--json", "--store", str(store)), stdout=subprocess.PIPE,
                              stderr=subprocess.PIPE, text=True, env=_env(), cwd=REPO) for f in (a, b)]
    reports = []
    for p in procs:
        out, err = p.communicate(timeout=300)
        assert p.returncode == 0, err
        reports.append(json.loads(out))
    assert sorted(r["facts_added"] for r in reports) == [100, 150]  # the later one skips the overlap
    con = duckdb.connect(str(store), read_only=True)
    try:
        got = set(con.execute("SELECT subject, relation, object FROM facts").fetchall())
        n, n_vec, n_loads = con.execute("SELECT (SELECT count(*) FROM facts), (SELECT count(*) FROM "
                                        "fact_vectors), (SELECT count(*) FROM loads)").fetchall()[0]
    finally:
        con.close()
    assert got == set(FACTS) | set(a_rows) | set(b_rows)
    assert n == n_vec == len(FACTS) + 250 and n_loads == 3


def test_load_that_cannot_get_the_store_fails_clearly_and_changes_nothing(store):
    """With another process holding the store past HOPPER_LOCK_TIMEOUT, a load gives up: exit
    status 1, one line saying why and what to do, and the store has what it had."""
    more = write_csv(store.parent / "more.csv", catalogue(500, 20))
    holder = subprocess.Popen([sys.executable, "-c", HOLDER, str(store), "20"], stdout=subprocess.PIPE,
                              stderr=subprocess.PIPE, text=True, env=_env())
    try:
        assert holder.stdout.readline().strip() == "locked", holder.stderr.read()
        proc = subprocess.run(_hopper("load", more, "--store", str(store)), capture_output=True, text=True,
                              env=dict(_env(), HOPPER_LOCK_TIMEOUT="2"), cwd=REPO, timeout=120)
    finally:
        holder.kill()
        holder.wait()
    assert proc.returncode == 1 and proc.stdout == ""
    assert proc.stderr.count("\n") == 1 and "Traceback" not in proc.stderr, proc.stderr
    assert "held the store for too long" in proc.stderr and "HOPPER_LOCK_TIMEOUT" in proc.stderr
    assert hopper.open_store(store).info()["facts"] == len(FACTS)

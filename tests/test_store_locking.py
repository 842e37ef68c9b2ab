"""Store.connect's flock guard: readers and writers in many processes, waits, time-outs, fall-backs."""

import fcntl
import json
import os
import subprocess
import sys
import textwrap
import threading
import time
from pathlib import Path

import duckdb
import pytest

from helpers import REPO, hopper_env
from hopper import store as store_mod
from hopper.errors import InputError, StoreBusyError
from hopper.store import Store

WORKER = textwrap.dedent("""
    import json, sys, time
    from hopper.store import Store
    path, role, name, secs = sys.argv[1], sys.argv[2], int(sys.argv[3]), float(sys.argv[4])
    st = Store(path)
    end = time.monotonic() + secs
    done, errors, seen = 0, [], 0
    while time.monotonic() < end:
        try:
            if role == "w":
                with st.transaction() as con:
                    con.execute("CREATE TABLE IF NOT EXISTS t (w INTEGER, i INTEGER, pad VARCHAR)")
                    con.execute("INSERT INTO t VALUES (?, ?, ?)", [name, done, "x" * 3000])
                print(done, flush=True)  # only once the transaction has committed
            else:
                with st.connect() as con:
                    n, = con.execute("SELECT count(*) FROM t").fetchall()[0]
                    con.execute("SELECT sum(length(pad)) FROM t").fetchall()
                if n < seen:
                    errors.append(f"count went back from {seen} to {n}")
                seen = max(seen, n)
                time.sleep(0.005)
            done += 1
        except Exception as exc:  # noqa: BLE001
            errors.append(f"{type(exc).__name__}: {str(exc).splitlines()[0][:200]}")
    print("RESULT " + json.dumps({"role": role, "done": done, "errors": errors}), flush=True)
""")


@pytest.fixture()
def store(tmp_path):
    st = Store(tmp_path / "s.duckdb")
    with st.transaction() as con:
        con.execute("CREATE TABLE IF NOT EXISTS t (w INTEGER, i INTEGER, pad VARCHAR)")
    return st


def _hold(path: Path, mode=fcntl.LOCK_EX) -> int:
    fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
    fcntl.flock(fd, mode)
    return fd


def test_many_writers_and_readers_lose_nothing(store):
    secs, writers, readers = 8.0, 4, 4
    procs = [subprocess.Popen([sys.executable, "-c", WORKER, str(store.path), role, str(i), str(secs)],
                              stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                              env=hopper_env(HOPPER_LOCK_TIMEOUT="30"), cwd=REPO)
             for role, n in (("w", writers), ("r", readers)) for i in range(n)]
    committed, errors, writes, reads = set(), [], 0, 0
    for k, p in enumerate(procs):
        out, err = p.communicate(timeout=90)
        assert p.returncode == 0, err
        lines = out.splitlines()
        result = json.loads(lines[-1].removeprefix("RESULT "))
        errors += result["errors"]
        if result["role"] == "w":
            committed |= {(k, int(x)) for x in lines[:-1]}
            writes += result["done"]
            assert result["done"] > 0, "a writer never got in"
        else:
            reads += result["done"]
    assert not errors, errors[:5]
    assert reads > 0 and writes > 0
    with store.connect() as con:
        rows = set(con.execute("SELECT w, i FROM t").fetchall())
    assert committed <= rows, f"{len(committed - rows)} committed rows are missing"
    assert len(rows) == len(committed)


def test_reader_waits_while_a_writer_holds_the_gate(store):
    gate = _hold(Path(str(store.path) + ".gate"))
    opened = []

    def read():
        with store.connect() as con:
            opened.append(time.monotonic())
            con.execute("SELECT count(*) FROM t").fetchall()

    t0 = time.monotonic()
    th = threading.Thread(target=read)
    th.start()
    time.sleep(0.6)
    assert not opened, "the reader opened the store past a held gate"
    os.close(gate)
    th.join(10)
    assert opened and opened[0] - t0 >= 0.5


def test_waiting_writer_holds_off_new_readers(store):
    # a reader holds the data lock; a writer arrives and waits; a later reader must queue behind it
    reader = _hold(Path(str(store.path) + ".lock"), fcntl.LOCK_SH)
    wrote = []

    def write():
        with store.transaction() as con:
            con.execute("INSERT INTO t VALUES (1, 1, 'w')")
        wrote.append(time.monotonic())

    th = threading.Thread(target=write)
    th.start()
    time.sleep(0.3)
    with pytest.raises(StoreBusyError):
        with store.connect(timeout=0.3):
            pass
    assert not wrote
    os.close(reader)
    th.join(10)
    assert wrote
    with store.connect(timeout=5) as con:
        assert con.execute("SELECT count(*) FROM t").fetchall()[0][0] == 1


def test_timeout_raises_store_busy(store):
    gate = _hold(Path(str(store.path) + ".gate"))
    try:
        code = ("import sys\nfrom hopper.store import Store\nfrom hopper.errors import StoreBusyError\n"
                "try:\n    with Store(sys.argv[1]).connect(): pass\n"
                "except StoreBusyError as e:\n    print('busy', e); sys.exit(3)\n")
        t0 = time.monotonic()
        proc = subprocess.run([sys.executable, "-c", code, str(store.path)], capture_output=True,
                              text=True, env=hopper_env(HOPPER_LOCK_TIMEOUT="0.5"), cwd=REPO, timeout=60)
        assert proc.returncode == 3, proc.stderr
        assert "HOPPER_LOCK_TIMEOUT" in proc.stdout
        assert time.monotonic() - t0 < 20
        with pytest.raises(StoreBusyError):  # in-process, for both kinds of connection
            with store.connect(write=True, timeout=0.2):
                pass
    finally:
        os.close(gate)
    with store.connect(timeout=5):  # and nothing was left held
        pass


def test_no_lock_files_for_a_path_that_is_not_a_store(tmp_path):
    text = tmp_path / "notes.txt"
    text.write_text("hello, not a database\n")
    for st, write in ((Store(text), True), (Store(text), False), (Store(tmp_path / "none.duckdb"), False)):
        with pytest.raises(InputError):
            with st.connect(write=write):
                pass
    assert sorted(p.name for p in tmp_path.iterdir()) == ["notes.txt"]


def test_lock_files_sit_beside_the_store(tmp_path):
    st = Store(tmp_path / "sub" / "x.duckdb")
    with st.connect(write=True):
        pass
    names = sorted(p.name for p in (tmp_path / "sub").iterdir())
    assert "x.duckdb.gate" in names and "x.duckdb.lock" in names


def test_read_only_folder_reads_without_flock(store, monkeypatch):
    for suffix in (".gate", ".lock"):
        Path(str(store.path) + suffix).unlink()
    real_open = os.open

    def refuse(path, flags, *args, **kw):
        if str(path).endswith((".gate", ".lock")):
            raise PermissionError(13, "Permission denied", str(path))
        return real_open(path, flags, *args, **kw)

    monkeypatch.setattr(store_mod.os, "open", refuse)
    with store.connect() as con:
        assert con.execute("SELECT count(*) FROM t").fetchall()[0][0] == 0


def test_existing_lock_files_in_a_read_only_folder_still_lock(store, monkeypatch):
    real_open = os.open

    def read_only(path, flags, *args, **kw):
        if str(path).endswith((".gate", ".lock")) and flags & (os.O_RDWR | os.O_CREAT):
            raise PermissionError(13, "Permission denied", str(path))
        return real_open(path, flags, *args, **kw)

    gate = _hold(Path(str(store.path) + ".gate"))
    monkeypatch.setattr(store_mod.os, "open", read_only)
    try:
        with pytest.raises(StoreBusyError):
            with store.connect(timeout=0.2):
                pass
    finally:
        os.close(gate)
    with store.connect(timeout=5):
        pass


def test_lock_file_removed_while_waiting(store):
    # someone deletes the side files while we wait on the old gate: we must not keep a lock on the
    # dead file while others lock the new one
    gate_path = Path(str(store.path) + ".gate")
    old = _hold(gate_path)
    got = []

    def read():
        with store.connect(timeout=10):
            got.append(os.stat(gate_path).st_ino)

    th = threading.Thread(target=read)
    th.start()
    time.sleep(0.2)
    gate_path.unlink()
    new = _hold(gate_path)  # the replacement, held by "another writer"
    os.close(old)
    time.sleep(0.4)
    assert not got, "the reader passed a gate that another writer holds"
    os.close(new)
    th.join(10)
    assert got == [os.stat(gate_path).st_ino]


def test_store_deleted_or_replaced_between_runs(store, tmp_path):
    with store.transaction() as con:
        con.execute("INSERT INTO t VALUES (1, 1, 'a')")
    for p in (store.path, Path(str(store.path) + ".wal")):
        p.unlink(missing_ok=True)
    with pytest.raises(InputError):
        with store.connect():
            pass
    with store.connect(write=True) as con:  # lock files from before are reused; a new store
        assert con.execute("SELECT count(*) FROM facts").fetchall()[0][0] == 0
    # replaced by another hopper store while the side files stay
    other = Store(tmp_path / "other.duckdb")
    with other.transaction() as con:
        con.execute("CREATE TABLE t2 (x INTEGER)")
        con.execute("INSERT INTO t2 VALUES (7)")
    os.replace(other.path, store.path)
    with store.connect() as con:
        assert con.execute("SELECT x FROM t2").fetchall() == [(7,)]
    # replaced by something that is not a store: refused, with the lock files left alone
    store.path.write_text("not a database")
    with pytest.raises(InputError):
        with store.connect(write=True):
            pass


def test_old_store_gains_direction_column(tmp_path):
    st = Store(tmp_path / "old.duckdb")
    with st.connect(write=True) as con:
        con.execute("DROP TABLE run_fetches")
        con.execute("CREATE TABLE run_fetches (run_id VARCHAR NOT NULL, hop INTEGER NOT NULL, "
                    "fact_id INTEGER NOT NULL, probability DOUBLE NOT NULL, from_entity VARCHAR, "
                    "to_entity VARCHAR, alternatives JSON, PRIMARY KEY (run_id, hop))")
        con.execute("INSERT INTO run_fetches VALUES ('r', 1, 1, 0.5, 'a', 'b', '[]')")
    with st.connect(write=True) as con:
        cols = [r[0] for r in con.execute("DESCRIBE run_fetches").fetchall()]
        assert cols[-1] == "direction" and cols[-2] == "alternatives"
        con.execute("INSERT INTO run_fetches VALUES ('r', 2, 1, 0.5, 'a', 'b', '[]', 'inverse')")
    fresh = duckdb.connect(":memory:")
    fresh.execute(store_mod.SCHEMA)
    cols = [r[0] for r in fresh.execute("DESCRIBE run_fetches").fetchall()]
    assert cols[-2:] == ["alternatives", "direction"]


def test_a_write_connection_adds_a_column_an_old_store_lacks(tmp_path):
    """Stores made before run_fetches.direction existed get it at their next write; a
    DuckDB file whose meta table is not hopper's is not taken for a store."""
    s = Store(tmp_path / "old.duckdb")
    with s.connect(write=True) as con:
        con.execute("ALTER TABLE run_fetches DROP COLUMN direction")
    with s.connect(write=True) as con:
        cols = [r[0] for r in con.execute("SELECT column_name FROM information_schema.columns "
                                          "WHERE table_name = 'run_fetches'").fetchall()]
    assert "direction" in cols
    other = tmp_path / "other.duckdb"
    c = duckdb.connect(str(other))
    c.execute("CREATE TABLE meta (a INTEGER)")
    c.close()
    with pytest.raises(InputError, match="not a hopper store|other tables"):
        with Store(other).connect() as con:
            pass

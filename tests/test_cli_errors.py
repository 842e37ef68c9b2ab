"""Bad input through the command line: exit status 2, one line on stderr, the store unchanged.

The real model and real DuckDB files throughout; every file here is invented for the test.
"""
from __future__ import annotations

import hashlib
import json
import os
import pathlib
import subprocess
import sys

import duckdb
import pytest

from helpers import hopper_env, query, run_cli
from hopper import cli
from hopper.errors import InputError
from hopper.questions import MAX_QUESTION, read_questions

GOOD = "subject,relation,object\nAda,born_in,London\nLondon,capital_of,England\nAda,wrote,Notes\n"


def digest(path) -> str | None:
    """The bytes of a file (and of its write-ahead log, if any) as one hash; None if absent."""
    h = hashlib.sha256()
    if not path.exists():
        return None
    h.update(path.read_bytes())
    wal = path.with_name(path.name + ".wal")
    if wal.exists():
        h.update(wal.read_bytes())
    return h.hexdigest()


def assert_one_line_error(status, out, err, *fragments):
    assert status == 2, err
    assert out == ""
    assert err.endswith("\n") and err.count("\n") == 1, err
    assert "Traceback" not in err
    for frag in fragments:
        assert frag in err, (frag, err)


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    """A hopper store with three facts, shared by every test here (none may change it)."""
    d = tmp_path_factory.mktemp("store")
    (d / "good.csv").write_text(GOOD, encoding="utf-8")
    assert cli.main(["load", str(d / "good.csv"), "--store", str(d / "s.duckdb")]) == 0
    return d / "s.duckdb"


@pytest.fixture
def unchanged(store):
    """Check after the test that the shared store's bytes are as before it."""
    before = digest(store)
    yield store
    assert digest(store) == before


def fact_count(path) -> int:
    return query(path, "SELECT count(*) FROM facts")[0][0]


# (file name, bytes, fragments the one error line must contain)
BAD_FACT_FILES = [
    ("missing.csv", b"subject,relation\nA,r\n", ["missing.csv", "line 1", "field 'object'",
                                                 "missing required column"]),
    ("misspelt.csv", b"subject,relaton,object\nA,r,B\n", ["misspelt.csv", "field 'relation'",
                                                         "'relaton'", "did you mean 'relation'"]),
    ("empty.csv", b"", ["empty.csv", "is empty"]),
    ("blanklines.csv", b"\n\n  \n", ["blanklines.csv", "is empty"]),
    ("header.csv", b"subject,relation,object\n", ["header.csv", "has a header but no rows"]),
    ("blank_subject.csv", b"subject,relation,object\nA,r,B\n,r,C\n",
     ["blank_subject.csv", "line 3", "field 'subject'"]),
    ("blank_relation.csv", b"subject,relation,object\nA,r,B\nC,r,D\nE,,F\n",
     ["blank_relation.csv", "line 4", "field 'relation'"]),
    ("space_object.csv", b"subject,relation,object\nA,r,B\nC,r,\t \xc2\xa0 \n",
     ["space_object.csv", "line 3", "field 'object'"]),
    ("quoted_space.csv", b'subject,relation,object\nA,"   ",B\n', ["line 2", "field 'relation'"]),
    ("latin1.csv", b"subject,relation,object\nA,r,B\nZ\xfcrich,r,C\n",
     ["latin1.csv", "line 3", "UTF-8"]),
    ("latin1_header.csv", b"s\xfcbject,relation,object\nA,r,B\n", ["line 1", "UTF-8"]),
    ("huge.csv", b"subject,relation,object,text\nA,r,B," + b"x" * 1_000_000 + b"\n",
     ["huge.csv", "line 2", "field 'text'", "longer than"]),
    ("ragged.csv", b"subject,relation,object\nA,r,B\nC,r\n", ["ragged.csv", "line 3", "2 fields"]),
    ("quote.csv", b'subject,relation,object\nA,r,B\n"C,r,D\n', ["quote.csv", "line 3", "quote"]),
    ("semicolon.csv", b"subject;relation;object\nA;r;B\n", ["semicolon.csv", "separated by"]),
    ("twice.csv", b"subject,relation,object,Subject\nA,r,B,C\n", ["field 'subject'", "twice"]),
    ("facts.txt", b"subject,relation,object\nA,r,B\n", ["facts.txt", "unknown file type '.txt'"]),
    ("noext", b"subject,relation,object\nA,r,B\n", ["noext", "unknown file type"]),
    ("bad.jsonl", b'{"subject": "A", "relation": "r", "object": "B"}\n{"subject": "C",\n',
     ["bad.jsonl", "line 2", "malformed JSON"]),
    ("array.ndjson", b'{"subject": "A", "relation": "r", "object": "B"}\n\n[1, 2]\n',
     ["array.ndjson", "line 3", "not a JSON object"]),
    ("badutf.jsonl", b'{"subject": "A", "relation": "r", "object": "\xff"}\n',
     ["badutf.jsonl", "line 1", "UTF-8"]),
    ("nokey.jsonl", b'{"subject": "A", "object": "B"}\n', ["field 'relation'", "missing required key"]),
    ("nullobj.jsonl", b'{"subject": "A", "relation": "r", "object": null}\n',
     ["line 1", "field 'object'"]),
    ("broken.parquet", b"PAR1 this is not parquet", ["broken.parquet", "cannot be read"]),
    ("empty.parquet", b"", ["empty.parquet", "is empty"]),
]


@pytest.mark.parametrize("name,data,fragments", BAD_FACT_FILES, ids=[c[0] for c in BAD_FACT_FILES])
def test_bad_fact_file_exits_2_with_one_line_and_store_unchanged(tmp_path, unchanged,
                                                                 name, data, fragments):
    f = tmp_path / name
    f.write_bytes(data)
    assert_one_line_error(*run_cli("load", f, "--store", unchanged), *fragments)
    assert not list(tmp_path.glob("*.rejected.csv"))  # nothing is written unless --skip-invalid


def test_bad_file_among_good_ones_loads_nothing(tmp_path, unchanged):
    good = tmp_path / "new.csv"
    good.write_text("subject,relation,object\nNew,r,Thing\n", encoding="utf-8")
    bad = tmp_path / "bad.csv"
    bad.write_text("subject,relation,object\nX,,Y\n", encoding="utf-8")
    assert_one_line_error(*run_cli("load", good, bad, "--store", unchanged), "bad.csv", "line 2")
    assert fact_count(unchanged) == 3


def test_missing_file_and_folder(tmp_path, unchanged):
    assert_one_line_error(*run_cli("load", tmp_path / "nope.csv", "--store", unchanged),
                          "nope.csv", "no such file")
    (tmp_path / "dir.csv").mkdir()
    assert_one_line_error(*run_cli("load", tmp_path / "dir.csv", "--store", unchanged),
                          "dir.csv", "folder")


@pytest.mark.skipif(not hasattr(os, "geteuid") or os.geteuid() == 0, reason="root can read any file")
def test_unreadable_file(tmp_path, unchanged):
    f = tmp_path / "secret.csv"
    f.write_text(GOOD, encoding="utf-8")
    f.chmod(0)
    try:
        assert_one_line_error(*run_cli("load", f, "--store", unchanged), "secret.csv", "cannot be read")
    finally:
        f.chmod(0o600)


@pytest.mark.parametrize("content", [b"just some notes\n", b"\x00" * 64, b"x"],
                         ids=["text", "zeros", "tiny"])
def test_store_that_is_not_duckdb_is_never_overwritten(tmp_path, content):
    target = tmp_path / "notes.duckdb"
    target.write_bytes(content)
    f = tmp_path / "f.csv"
    f.write_text(GOOD, encoding="utf-8")
    for argv in (["load", f], ["info"], ["ask", "Where was Ada born?"]):
        assert_one_line_error(*run_cli(*argv, "--store", target), "notes.duckdb")
        assert target.read_bytes() == content
    assert sorted(p.name for p in tmp_path.iterdir()) == ["f.csv", "notes.duckdb"]


def test_empty_store_file_is_refused(tmp_path):
    target = tmp_path / "empty.duckdb"
    target.write_bytes(b"")
    f = tmp_path / "f.csv"
    f.write_text(GOOD, encoding="utf-8")
    assert_one_line_error(*run_cli("load", f, "--store", target), "empty.duckdb")
    assert target.read_bytes() == b""


def test_store_that_is_a_folder(tmp_path):
    f = tmp_path / "f.csv"
    f.write_text(GOOD, encoding="utf-8")
    assert_one_line_error(*run_cli("load", f, "--store", tmp_path), "folder")


def test_duckdb_file_that_is_not_a_hopper_store_is_left_unchanged(tmp_path):
    other = tmp_path / "other.duckdb"
    con = duckdb.connect(str(other))
    con.execute("CREATE TABLE accounts (id INTEGER, owner VARCHAR)")
    con.execute("INSERT INTO accounts VALUES (1, 'x')")
    con.close()
    before = digest(other)
    f = tmp_path / "f.csv"
    f.write_text(GOOD, encoding="utf-8")
    for argv in (["load", f], ["info"]):
        assert_one_line_error(*run_cli(*argv, "--store", other), "other.duckdb", "not a hopper store")
        assert digest(other) == before


def test_model_mismatch_is_refused_and_store_unchanged(tmp_path):
    path = tmp_path / "s.duckdb"
    f = tmp_path / "f.csv"
    f.write_text(GOOD, encoding="utf-8")
    assert run_cli("load", f, "--store", path)[0] == 0
    con = duckdb.connect(str(path))
    con.execute("UPDATE meta SET value = ? WHERE key = 'model_sha256'", ["0" * 64])
    con.close()
    before = digest(path)
    more = tmp_path / "more.csv"
    more.write_text("subject,relation,object\nNew,r,Thing\n", encoding="utf-8")
    status, out, err = run_cli("load", more, "--store", path)
    assert_one_line_error(status, out, err, "s.duckdb", "000000000000", "cannot be mixed")
    assert digest(path) == before
    assert fact_count(path) == 3


def test_skip_invalid_via_cli_reports_the_rejected_file(tmp_path):
    f = tmp_path / "f.csv"
    f.write_text("subject,relation,object\nA,r,B\n, r ,C\nD,r,E\n", encoding="utf-8")
    status, out, err = run_cli("load", f, "--store", tmp_path / "s.duckdb", "--skip-invalid", "--json")
    assert status == 0 and err == ""
    report = json.loads(out)
    assert (report["facts_added"], report["rejected"]) == (2, 1)
    rejected = tmp_path / "f.csv.rejected.csv"
    assert report["rejected_files"] == [str(rejected)]
    assert rejected.read_text(encoding="utf-8").splitlines()[1].startswith("3,subject,")


def test_console_script_reports_bad_input_in_one_line(tmp_path):
    f = tmp_path / "f.csv"
    f.write_text("subject,relation,object\nA,r,B\nC,r,D\nE,,F\n", encoding="utf-8")
    exe = pathlib.Path(sys.executable).with_name("hopper")
    proc = subprocess.run([str(exe), "load", str(f), "--store", str(tmp_path / "s.duckdb")],
                          capture_output=True, text=True, timeout=120,
                          env=hopper_env())
    assert proc.returncode == 2 and proc.stdout == ""
    assert proc.stderr.count("\n") == 1 and "Traceback" not in proc.stderr
    assert "f.csv, line 4, field 'relation'" in proc.stderr
    assert not (tmp_path / "s.duckdb").exists()


# -- question files and options ---------------------------------------------------------------

BAD_QUESTION_FILES = [
    ("malformed", '{"question": "Where?", "answer": "x"}\n{"question": "Who?", "answer": \n',
     2, None, "malformed JSON"),
    ("missing answer", '{"question": "Where?", "answer": "x"}\n\n{"question": "Who?"}\n',
     3, "answer", "missing"),
    ("number answer", '{"question": "Where?", "answer": 42}\n', 1, "answer", "string"),
    ("object answer", '{"question": "Where?", "answer": {"a": 1}}\n', 1, "answer", "string"),
    ("list with number", '{"question": "Where?", "answer": ["x", 3]}\n', 1, "answer", "string"),
    ("empty list", '{"question": "Where?", "answer": []}\n', 1, "answer", "non-empty"),
    ("empty question", '{"question": "   ", "answer": "x"}\n', 1, "question", "empty"),
    ("number question", '{"question": 7, "answer": "x"}\n', 1, "question", "string"),
    ("long question", json.dumps({"question": "why " * 25_000, "answer": "x"}) + "\n", 1,
     "question", f"longer than {MAX_QUESTION}"),
    ("no question", '{"answer": "x"}\n', 1, "question", "missing"),
    ("half completion", '{"subject": "Ada", "answer": "x"}\n', 1, "relation", "both"),
    ("not object", '["Where?", "x"]\n', 1, None, "not a JSON object"),
    ("no lines", "\n\n", None, None, "no questions"),
]


@pytest.mark.parametrize("label,text,line,field,fragment", BAD_QUESTION_FILES,
                         ids=[c[0] for c in BAD_QUESTION_FILES])
def test_bad_question_file_names_line_and_field(tmp_path, label, text, line, field, fragment):
    f = tmp_path / "q.jsonl"
    f.write_text(text, encoding="utf-8")
    with pytest.raises(InputError) as e:
        read_questions(f)
    assert (e.value.line, e.value.field) == (line, field)
    assert fragment in str(e.value) and "\n" not in str(e.value)


def test_question_file_with_invalid_utf8_names_the_line(tmp_path):
    f = tmp_path / "q.jsonl"
    f.write_bytes(b'{"question": "Where?", "answer": "x"}\n{"question": "Z\xfcrich?", "answer": "x"}\n')
    with pytest.raises(InputError) as e:
        read_questions(f)
    assert e.value.line == 2 and "UTF-8" in str(e.value)


def test_question_file_with_byte_order_mark_and_crlf_reads(tmp_path):
    f = tmp_path / "q.jsonl"
    f.write_bytes(b'\xef\xbb\xbf{"question": "Where?", "answer": ["x", "y"]}\r\n'
                  b'{"subject": "Ada", "relation": "born_in", "answer": "London", "other": 1}\r\n')
    a, b = read_questions(f)
    assert (a.text, a.answers, a.line) == ("Where?", ["x", "y"], 1)
    assert (b.subject, b.relation, b.answers, b.line) == ("Ada", "born_in", ["London"], 2)


@pytest.mark.parametrize("argv,fragments", [
    (["ask", ""], ["field 'question'", "empty"]),
    (["ask", " \t "], ["field 'question'", "empty"]),
    (["ask", "x" * 100_000], ["longer than"]),
    (["ask", "--top", "-1", "X"], ["--top", "-1"]),
    (["ask", "--top", "0", "X"], ["--top"]),
    (["ask", "--top", "many", "X"], ["--top", "whole number"]),
    (["ask", "--strategy", "psychic", "X"], ["--strategy"]),
    (["ask", "--subject", "Ada"], ["--relation"]),
    (["train", "--max-hops", "0", "--questions", "q.jsonl"], ["--max-hops", "got 0"]),
    (["train", "--max-hops", "9", "--questions", "q.jsonl"], ["--max-hops"]),
    (["load"], ["FILE"]),
    (["frobnicate"], ["frobnicate"]),
], ids=lambda v: " ".join(v) if isinstance(v, list) and len(" ".join(v)) < 40 else None)
def test_usage_errors_exit_2_with_one_line(unchanged, argv, fragments):
    assert_one_line_error(*run_cli(*argv, "--store", unchanged)
                          if argv[0] != "frobnicate" else run_cli(*argv), *fragments)


def test_train_with_malformed_question_file_names_the_line(tmp_path, unchanged):
    q = tmp_path / "q.jsonl"
    q.write_text('{"question": "Where was Ada born?", "answer": "London"}\n{oops}\n', encoding="utf-8")
    assert_one_line_error(*run_cli("train", "--questions", q, "--store", unchanged),
                          "q.jsonl", "line 2", "malformed JSON")


def test_ask_on_missing_store_is_one_line(tmp_path):
    assert_one_line_error(*run_cli("ask", "Where?", "--store", tmp_path / "none.duckdb"),
                          "none.duckdb", "no hopper store")
    assert not (tmp_path / "none.duckdb").exists()


# ask reads questions without answers, so a bad answer is not its business
CLI_BAD_QUESTIONS = [(cmd, *case) for cmd in ("train", "ask", "eval") for case in BAD_QUESTION_FILES
                     if not (cmd == "ask" and case[3] == "answer")]


@pytest.mark.parametrize("command,label,text,line,field,fragment", CLI_BAD_QUESTIONS,
                         ids=[f"{c[0]}-{c[1]}" for c in CLI_BAD_QUESTIONS])
def test_bad_question_file_through_the_cli_exits_2_and_changes_nothing(tmp_path, unchanged, command,
                                                                       label, text, line, field, fragment):
    f = tmp_path / "q.jsonl"
    f.write_text(text, encoding="utf-8")
    where = [f"line {line}"] if line else []
    where += [f"field '{field}'"] if field else []
    assert_one_line_error(*run_cli(command, "--questions", f, "--store", unchanged),
                          "q.jsonl", fragment, *where)


def test_interrupt_exits_130_and_an_internal_fault_1_unless_debugging(unchanged, monkeypatch):
    """Ctrl-C: exit status 130 and one line; an internal fault: exit status 1 and one line
    naming HOPPER_DEBUG, which, when set, lets the traceback through instead."""
    from hopper.api import Hopper

    def interrupted(self, *a, **kw):
        raise KeyboardInterrupt

    def broken(self, *a, **kw):
        raise RuntimeError("something inside broke")

    monkeypatch.delenv("HOPPER_DEBUG", raising=False)
    monkeypatch.setattr(Hopper, "info", interrupted)
    assert run_cli("info", "--store", unchanged) == \
        (130, "", "hopper: interrupted; the store is as it was before this command\n")
    monkeypatch.setattr(Hopper, "info", broken)
    assert run_cli("info", "--store", unchanged) == \
        (1, "", "hopper: internal error: RuntimeError: something inside broke "
                "(set HOPPER_DEBUG=1 for the traceback)\n")
    monkeypatch.setenv("HOPPER_DEBUG", "1")
    with pytest.raises(RuntimeError, match="something inside broke"):
        run_cli("info", "--store", unchanged)

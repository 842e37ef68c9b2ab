"""Safety: no pickle anywhere a file could come from someone else, SQL-looking text stays data, and
side files stay in the folders the user named.  All facts here are invented.
"""
from __future__ import annotations

import ast
import json
from pathlib import Path

import duckdb
import pytest

import hopper
from helpers import REPO, run_cli, write_csv, write_jsonl


# -- no pickle ---------------------------------------------------------------------------------
def unsafe_loads(source: str, name: str) -> list[str]:
    """Calls and imports in Python ``source`` that can run code from a data file:
    ``import pickle`` / ``joblib`` / ``dill`` / ``shelve``, ``np.load`` or ``numpy.load``
    without ``allow_pickle=False``, ``allow_pickle=True`` anywhere, ``torch.load`` without
    ``weights_only=True``."""
    found = []
    for node in ast.walk(ast.parse(source, name)):
        if isinstance(node, (ast.Import, ast.ImportFrom)):
            mods = [a.name for a in node.names] if isinstance(node, ast.Import) else [node.module or ""]
            for m in mods:
                if m.split(".")[0] in ("pickle", "cPickle", "joblib", "dill", "shelve", "cloudpickle"):
                    found.append(f"{name}:{node.lineno}: import {m}")
        if not isinstance(node, ast.Call):
            continue
        func = ast.unparse(node.func)
        kw = {k.arg: ast.unparse(k.value) for k in node.keywords if k.arg}
        if kw.get("allow_pickle") == "True":
            found.append(f"{name}:{node.lineno}: {func}(allow_pickle=True)")
        if func in ("np.load", "numpy.load") and kw.get("allow_pickle") != "False":
            found.append(f"{name}:{node.lineno}: {func} without allow_pickle=False")
        if func == "torch.load" and kw.get("weights_only") != "True":
            found.append(f"{name}:{node.lineno}: torch.load without weights_only=True")
        if func.endswith(("pickle.load", "pickle.loads", "pd.read_pickle")):
            found.append(f"{name}:{node.lineno}: {func}")
    return found


def test_the_checker_finds_what_it_looks_for():
    bad = ("import pickle\nimport numpy as np\nimport torch\n"
           "a = np.load('x.npy')\nb = np.load('x.npz', allow_pickle=True)\nc = torch.load('m.pt')\n"
           "d = np.load('y.npy', allow_pickle=False)\ne = torch.load('m.pt', weights_only=True)\n")
    got = unsafe_loads(bad, "t.py")
    assert [g.split(":")[1] for g in got] == ["1", "4", "5", "5", "6"], got


def test_no_pickle_in_the_package_or_scripts():
    files = sorted((REPO / "hopper").glob("*.py")) + sorted((REPO / "scripts").glob("*.py"))
    assert len(files) > 10
    found = [f for p in files for f in unsafe_loads(p.read_text("utf-8"), p.name)]
    assert not found, found


# -- SQL-looking text is data --------------------------------------------------------------------
SQLISH = {"Robert'); DROP TABLE facts;--": "O'Brien & Sons; DELETE FROM runs",
          "SELECT * FROM meta": "x\" OR \"1\"=\"1",
          "part ?; $1 %s {0}": "'); UPDATE policies SET active = true; --"}


def test_sql_looking_facts_and_questions_are_answered_and_audited_verbatim(tmp_path):
    # each the only fact touching either name
    facts = write_csv(tmp_path / "facts.csv", [(part, "made by", maker) for part, maker in SQLISH.items()])
    store = tmp_path / "s.duckdb"
    assert run_cli("load", facts, "--store", store)[0] == 0
    ids = []
    for part, maker in SQLISH.items():
        rc, out, _ = run_cli("ask", "--subject", part, "--relation", "made by", "--strategy", "walk",
                          "--json", "--store", store)
        doc = json.loads(out)
        assert rc == 0 and doc["subject"] == part and doc["start_entities"] == [part]
        assert [(f["subject"], f["relation"], f["object"]) for f in doc["fetches"]] == [(part, "made by", maker)]
        assert doc["answer"] == maker
        ids.append(doc["run_id"])
    # a question in words with the same text is recorded verbatim and found by --contains
    q = "Who makes Robert'); DROP TABLE facts;-- ?"
    rc, out, _ = run_cli("ask", q, "--strategy", "walk", "--json", "--store", store)
    assert rc == 0 and json.loads(out)["question"] == q
    rc, out, _ = run_cli("audit", "--list", "--contains", "'); DROP TABLE", "--json", "--store", store)
    assert [r["question"] for r in json.loads(out)] == [q, "Robert'); DROP TABLE facts;-- made by?"]
    rc, out, _ = run_cli("audit", ids[0], "--json", "--store", store)
    assert json.loads(out)["fetches"][0]["subject"] == "Robert'); DROP TABLE facts;--"
    con = duckdb.connect(str(store), read_only=True)
    try:
        tables = {r[0] for r in con.execute("SELECT table_name FROM information_schema.tables").fetchall()}
        n_facts, n_runs = con.execute("SELECT (SELECT count(*) FROM facts), (SELECT count(*) FROM runs)").fetchall()[0]
    finally:
        con.close()
    assert {"facts", "runs", "meta", "policies"} <= tables
    assert (n_facts, n_runs) == (len(SQLISH), len(SQLISH) + 1)


# -- side files stay where the user said ----------------------------------------------------------
def tree(folder: Path) -> set:
    return {str(p.relative_to(folder)) for p in folder.rglob("*")}


def test_side_files_land_beside_what_the_user_named_and_nowhere_else(tmp_path, monkeypatch):
    """load --skip-invalid (rejected rows CSV beside the input), train (curve PNG and checkpoint
    beside the store), ask, audit --html FILE (that file only): run from an empty working folder,
    each writes only into the folder the user named, and replaces a link planted at a side
    file's name instead of writing through it."""
    work, inputs, stores, pages, outside = (tmp_path / n for n in ("work", "in put", "stores", "pages", "outside"))
    for d in (work, inputs, stores, pages, outside):
        d.mkdir()
    victim = outside / "victim.txt"
    victim.write_text("keep me", encoding="utf-8")
    facts = write_csv(inputs / "naïve ..facts.csv", [
        ("Tarvel pump", "made by", "Ostrel Works"), ("Ostrel Works", "based in", "Quarnby"),
        ("Mirren gasket", "made by", "Brannock Tooling"), (" ", "made by", "Nobody"),
        ("Brannock Tooling", "based in", "Morrowgate")])
    questions = write_jsonl(inputs / "q.jsonl", [
        {"question": "Who makes the Tarvel pump?", "answer": "Ostrel Works"},
        {"question": "Who makes the Mirren gasket?", "answer": "Brannock Tooling"}])
    store = stores / "s.duckdb"
    # links planted where side files will go, pointing outside
    for name in (facts.name + ".rejected.csv",):
        (inputs / name).symlink_to(victim)
    (stores / "s.duckdb.train-v1.png").symlink_to(victim)
    (pages / "page.html").symlink_to(victim)
    before = {d: tree(d) for d in (inputs, outside)}

    monkeypatch.chdir(work)  # relative paths would land here; nothing may
    monkeypatch.delenv("HOPPER_STORE", raising=False)

    def hop(*args):
        rc, out, err = run_cli(*args)
        assert rc == 0, err
        return out

    hop("load", facts, "--skip-invalid", "--store", store)
    hop("train", "--questions", questions, "--valid", questions, "--epochs", "1", "--store", store)
    run_id = json.loads(hop("ask", "Who makes the Tarvel pump?", "--json", "--store", store))["run_id"]
    hop("audit", run_id, "--html", pages / "page.html", "--store", store)

    assert victim.read_text(encoding="utf-8") == "keep me"
    assert tree(outside) == before[outside]
    assert list(work.iterdir()) == []
    rejected = inputs / (facts.name + ".rejected.csv")
    assert tree(inputs) == before[inputs] and not rejected.is_symlink()
    assert rejected.read_text("utf-8").splitlines()[1].startswith("5,subject,")
    png = stores / "s.duckdb.train-v1.png"
    assert not png.is_symlink() and png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert {p.split("/")[0] for p in tree(stores)} <= {"s.duckdb", "s.duckdb.wal", "s.duckdb.gate",
                                                       "s.duckdb.lock", "s.duckdb.cache",
                                                       "s.duckdb.train-v1.png"}
    page = pages / "page.html"
    assert tree(pages) == {"page.html"} and not page.is_symlink()
    assert "Tarvel pump" in page.read_text("utf-8")


@pytest.mark.parametrize("target", ["missing/page.html", "."])
def test_html_to_a_folder_that_does_not_exist_or_is_a_folder_is_refused(tmp_path, target):
    facts = tmp_path / "f.csv"
    facts.write_text("subject,relation,object\nTarvel pump,made by,Ostrel Works\n", encoding="utf-8")
    store = tmp_path / "s.duckdb"
    hp = hopper.open_store(store)
    hp.load([facts], progress=False)
    run_id = hp.ask("Who makes the Tarvel pump?", strategy="walk")["run_id"]
    before = tree(tmp_path)
    assert run_cli("audit", run_id, "--html", tmp_path / target, "--store", store)[0] == 2
    assert tree(tmp_path) == before

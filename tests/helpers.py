"""Helpers the test modules share: paths, running hopper's command line, invented input files.

Each helper is written here once; test modules import from here, never from each other.
"""
from __future__ import annotations

import csv
import io
import json
import os
import sys
import textwrap
from contextlib import redirect_stderr, redirect_stdout
from pathlib import Path

import numpy as np

REPO = Path(__file__).resolve().parents[1]
DEMO = REPO / "factstores" / "supply"


# -- running the command line ------------------------------------------------------------------
def hopper_env(**extra: str) -> dict:
    """The environment for a hopper subprocess: the model offline, one BLAS thread, no
    ``HOPPER_STORE`` from the caller's shell (every test names its store), plus ``extra``."""
    env = dict(os.environ, HF_HUB_OFFLINE="1", TRANSFORMERS_OFFLINE="1", OPENBLAS_NUM_THREADS="1",
               **extra)
    env.pop("HOPPER_STORE", None)
    return env


def hopper_cmd(*args) -> list[str]:
    """argv for ``hopper ARGS...`` in a fresh Python process."""
    return [sys.executable, "-m", "hopper.cli", *map(str, args)]


def cli_driver(patch: str) -> str:
    """Source for ``python -c``: run ``patch`` (Python that wraps parts of hopper), then
    hopper's command line with the process's arguments."""
    return textwrap.dedent(patch) + "\nimport sys\nfrom hopper.cli import main\nsys.exit(main(sys.argv[1:]))\n"


def run_cli(*argv) -> tuple[int, str, str]:
    """Run hopper's command line in this process: (exit status, stdout, stderr)."""
    from hopper.cli import main

    out, err = io.StringIO(), io.StringIO()
    with redirect_stdout(out), redirect_stderr(err):
        rc = main([str(a) for a in argv])
    return rc, out.getvalue(), err.getvalue()


# -- input files -------------------------------------------------------------------------------
def write_csv(path: Path, rows, header=("subject", "relation", "object"), delimiter=",") -> Path:
    with open(path, "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh, delimiter=delimiter, lineterminator="\n")
        w.writerow(header)
        w.writerows(rows)
    return path


def write_jsonl(path: Path, objs) -> Path:
    path.write_text("".join(json.dumps(o, ensure_ascii=False) + "\n" for o in objs), encoding="utf-8")
    return path


def catalogue(start: int, n: int) -> list[tuple]:
    """Invented facts ``n`` at a time: numbered parts, three relations, 37 sites."""
    rels = ["made by", "stored in", "shipped to"]
    return [(f"Kessel part {k:05d}", rels[k % 3], f"Harl site {k % 37:02d}") for k in range(start, start + n)]


def query(store_path, sql: str, params=()) -> list[tuple]:
    """Rows of ``sql`` on a store opened read-only (outside hopper's own code)."""
    import duckdb

    con = duckdb.connect(str(store_path), read_only=True)
    try:
        return con.execute(sql, list(params)).fetchall()
    finally:
        con.close()


# -- the demo's questions ----------------------------------------------------------------------
def demo_questions(split: str, per_chain: int | None = None, wording: str | None = None) -> list[dict]:
    """Question dicts from the demo split, optionally a balanced subset per chain."""
    with open(DEMO / f"questions_{split}.jsonl", encoding="utf-8") as fh:
        rows = [json.loads(line) for line in fh]
    if wording:
        rows = [r for r in rows if r["wording"] == wording]
    if per_chain is None:
        return rows
    seen: dict = {}
    out = []
    for r in rows:
        if seen.get(r["chain"], 0) < per_chain:
            seen[r["chain"]] = seen.get(r["chain"], 0) + 1
            out.append(r)
    return out


# -- a tiny graph in memory --------------------------------------------------------------------
def make_graph(triples, dim: int = 16, seed: int = 0):
    """A Graph from (subject, relation, object) name triples, with random unit vectors."""
    from hopper.env import Graph

    rng = np.random.default_rng(seed)
    ents, rels = [], []
    for s, r, o in triples:
        for e in (s, o):
            if e not in ents:
                ents.append(e)
        if r not in rels:
            rels.append(r)

    def unit(n):
        v = rng.standard_normal((n, dim)).astype(np.float32)
        return v / np.linalg.norm(v, axis=1, keepdims=True)

    subj = np.array([ents.index(s) for s, _, _ in triples], np.int32)
    obj = np.array([ents.index(o) for _, _, o in triples], np.int32)
    rel = np.array([rels.index(r) for _, r, _ in triples], np.int32)
    ends = np.concatenate([subj, obj]).astype(np.int64)
    fidx = np.concatenate([np.arange(len(subj)), np.arange(len(obj))]).astype(np.int32)
    dirs = np.concatenate([np.zeros(len(subj), np.int8), np.ones(len(obj), np.int8)])
    order = np.argsort(ends, kind="stable")
    ptr = np.zeros(len(ents) + 1, np.int64)
    np.add.at(ptr, ends + 1, 1)
    arrays = {"fact_ids": np.arange(1, len(triples) + 1, dtype=np.int64), "subj": subj,
              "rel": rel, "obj": obj, "fact_vecs": unit(len(triples)), "entity_vecs": unit(len(ents)),
              "relation_vecs": unit(len(rels)), "adj_ptr": np.cumsum(ptr),
              "adj_fact": fidx[order], "adj_dir": dirs[order]}
    return Graph(arrays, ents, rels, facts_version=1)


# -- a tiny store to train on in seconds -------------------------------------------------------
KESSEL_PARTS = [f"Kessel part {i:02d}" for i in range(16)]
KESSEL_MAKERS = ["Ostrel Works", "Brannock Tooling", "Hask Dunmore", "Ardent Forge"]
KESSEL_CITIES = ["Quarnby", "Morrowgate", "Thessaly Point", "Lunfield"]
# training settings small enough for a run of a few seconds
TINY = dict(rollouts=6, batch_questions=8, hidden=16, patience=10, progress=False, members=1)


def make_tiny_store(folder: Path):
    """A store of 36 invented facts (parts, their makers, where the makers are based) and a
    question file asking who makes each part and where its maker is based."""
    import hopper

    rows = []
    for i, p in enumerate(KESSEL_PARTS):
        rows += [(p, "made by", KESSEL_MAKERS[i % 4]), (p, "stored in", KESSEL_CITIES[(i + 1) % 4])]
    rows += [(m, "based in", KESSEL_CITIES[i]) for i, m in enumerate(KESSEL_MAKERS)]
    qs = []
    for i, p in enumerate(KESSEL_PARTS):
        qs.append({"question": f"Who makes the {p}?", "answer": KESSEL_MAKERS[i % 4]})
        qs.append({"question": f"In which city is the maker of the {p} based?", "answer": KESSEL_CITIES[i % 4]})
    questions = write_jsonl(folder / "questions.jsonl", qs)
    hp = hopper.open_store(folder / "store.duckdb")
    hp.load([write_csv(folder / "facts.csv", rows)], progress=False)
    return hp, questions


def policy_params(hp, version: int) -> dict:
    from hopper.policy import Policy

    with hp.store.connect() as con:
        return Policy.read(con, version).params


def same_params(a: dict, b: dict) -> bool:
    return set(a) == set(b) and all(np.array_equal(a[k], b[k]) for k in a)

"""Checks on the committed demo store in factstores/supply/ (made by
scripts/make_demo_store.py)."""
from __future__ import annotations

import csv
import filecmp
import random
import re
import subprocess
import sys
from collections import Counter, defaultdict

import duckdb
import pytest

from helpers import DEMO, REPO, demo_questions

SCRIPT = REPO / "scripts" / "make_demo_store.py"
FILES = ["facts.csv", "questions_train.jsonl", "questions_valid.jsonl",
         "questions_test.jsonl", "README.md"]


@pytest.fixture(scope="module")
def splits() -> dict[str, list[dict]]:
    return {s: demo_questions(s) for s in ("train", "valid", "test")}


@pytest.fixture(scope="module")
def con():
    c = duckdb.connect()
    c.execute("CREATE TABLE facts AS SELECT * FROM read_csv(?, header=true, all_varchar=true)",
              [str(DEMO / "facts.csv")])
    yield c
    c.close()


def test_facts_file_shape(con):
    assert (DEMO / "facts.csv").stat().st_size < 2_000_000
    with open(DEMO / "facts.csv", encoding="utf-8", newline="") as f:
        header = next(csv.reader(f))
    assert header == ["id", "subject", "relation", "object", "text", "source"]
    n, n_ids, n_rel = con.execute(
        "SELECT count(*), count(DISTINCT id), count(DISTINCT relation) FROM facts").fetchone()
    assert n >= 3000 and n_ids == n
    assert 10 <= n_rel <= 14
    # every text sentence names both ends of its fact
    bad = con.execute("SELECT count(*) FROM facts WHERE NOT contains(text, subject) "
                      "OR NOT contains(text, object)").fetchone()[0]
    assert bad == 0


def test_entity_roles_do_not_share_names(con):
    # Names of different entity kinds (taken from the relation they play in) never coincide.
    kinds = {
        "part": "SELECT subject FROM facts WHERE relation = 'made by'",
        "supplier": "SELECT object FROM facts WHERE relation = 'made by' "
                    "UNION SELECT subject FROM facts WHERE relation = 'ships from'",
        "city": "SELECT object FROM facts WHERE relation IN ('based in', 'ships from', 'works in')",
        "country": "SELECT object FROM facts WHERE relation = 'registered in'",
        "auditor": "SELECT object FROM facts WHERE relation IN ('certified by', 'issued by')",
        "person": "SELECT subject FROM facts WHERE relation = 'works in'",
        "assembly": "SELECT subject FROM facts WHERE relation = 'contains part'",
        "port": "SELECT object FROM facts WHERE relation = 'ships through'",
        "certificate": "SELECT object FROM facts WHERE relation = 'holds certificate'",
    }
    sets = {k: {r[0] for r in con.execute(q).fetchall()} for k, q in kinds.items()}
    names = sorted(sets)
    for i, a in enumerate(names):
        for b in names[i + 1:]:
            assert not sets[a] & sets[b], (a, b, sorted(sets[a] & sets[b])[:5])


def test_split_sizes_and_hop_mix(splits):
    sizes = {k: len(v) for k, v in splits.items()}
    assert sizes == {"train": 1500, "valid": 300, "test": 600}
    for qs in splits.values():
        hops = Counter(q["hops"] for q in qs)
        assert set(hops) == {1, 2, 3}
        assert max(hops.values()) - min(hops.values()) <= len(qs) * 0.05
        for q in qs:
            assert 1 <= len(q["answer"]) <= 3
            assert q["hops"] == len(q["chain"].split(">"))
            assert q["start"] in q["question"]
    chains = {q["chain"] for qs in splits.values() for q in qs}
    assert 8 <= len(chains) <= 12


def _reachable(con, start: str, rels: list[str]) -> list[str]:
    # Independent recomputation of the gold answers, hop by hop (frontier
    # expansion with one SQL query per hop) rather than with the generator's
    # single multi-way join -- checking generated labels against a second,
    # separately written implementation is common practice.
    frontier = [start]
    for rel in rels:
        if not frontier:
            return []
        rows = con.execute(
            "SELECT DISTINCT object FROM facts WHERE relation = ? AND subject IN "
            "(SELECT unnest(?::VARCHAR[]))", [rel, frontier]).fetchall()
        frontier = [r[0] for r in rows]
    return sorted(frontier)


def test_answers_match_independent_sql(con, splits):
    rng = random.Random(7)
    for name, qs in splits.items():
        for q in rng.sample(qs, 150):
            assert _reachable(con, q["start"], q["chain"].split(">")) == sorted(q["answer"]), q


def test_heldout_start_entities(splits):
    train_text = "\n".join(q["question"] for q in splits["train"])
    train_starts = {q["start"] for q in splits["train"]}
    for split in ("valid", "test"):
        for q in splits[split]:
            assert q["start"] not in train_starts
            assert q["start"] not in train_text, (split, q["start"])
    assert not {q["start"] for q in splits["valid"]} & {q["start"] for q in splits["test"]}


def test_new_wordings_never_in_training_and_not_shared_by_valid_and_test(splits):
    # test: every second question of each chain (300 of 600); valid: every second question of
    # each chain's 25 (12 per chain, 144 of 300)
    assert sum(q["wording"] == "new" for q in splits["test"]) == len(splits["test"]) // 2
    assert sum(q["wording"] == "new" for q in splits["valid"]) == 144
    assert all(q["wording"] == "seen" for q in splits["train"])
    templates = defaultdict(dict)         # chain -> template -> wording
    used_in = defaultdict(set)            # (chain, template) -> splits
    for split, qs in splits.items():
        for q in qs:
            assert templates[q["chain"]].setdefault(q["template"], q["wording"]) == q["wording"]
            used_in[q["chain"], q["template"]].add(split)
    for chain, tw in templates.items():
        assert len(tw) >= 4, chain
        new = [t for t, w in tw.items() if w == "new"]
        seen = [t for t, w in tw.items() if w == "seen"]
        assert len(new) == 4 and min(new) > max(seen), chain
        for t in new:  # a new wording belongs to one split: valid's are not test's
            assert len(used_in[chain, t]) == 1 and "train" not in used_in[chain, t], (chain, t)
        owners = sorted(next(iter(used_in[chain, t])) for t in new)
        assert owners == ["test", "test", "valid", "valid"], (chain, owners)
    # a new wording of a chain never appears verbatim as a seen one
    seen_prefixes = {q["question"].replace(q["start"], "{}") for q in splits["train"]}
    for split in ("valid", "test"):
        for q in splits[split]:
            if q["wording"] == "new":
                assert q["question"].replace(q["start"], "{}") not in seen_prefixes


def test_new_wordings_use_words_no_training_question_uses(splits):
    # A "new" wording is not a reshuffle of training words: each new-wording question
    # has at least two words (names aside) that no training question contains, so answering
    # it rests on what the sentence model knows of synonyms ("nation" for "country").
    def words(q):
        return set(re.findall(r"[^\W\d_]+", q["question"].replace(q["start"], " ").lower()))

    trained = set().union(*(words(q) for q in splits["train"]))
    for split in ("valid", "test"):
        for q in splits[split]:
            if q["wording"] == "new":
                assert len(words(q) - trained) >= 2, q["question"]


def test_regeneration_is_byte_identical(tmp_path):
    # runtime: about 1 s (whole generator, default seed, into a tmp dir)
    subprocess.run([sys.executable, str(SCRIPT), "--out", str(tmp_path)],
                   check=True, cwd=REPO, capture_output=True, timeout=120)
    for name in FILES:
        assert filecmp.cmp(DEMO / name, tmp_path / name, shallow=False), name

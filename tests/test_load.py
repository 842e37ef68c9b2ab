"""Tests of ``hopper load`` with the real embedding model and real DuckDB stores.

All fact tables here are invented for the tests.  CSV quoting follows RFC 4180 (the rules
DuckDB's reader and Python's csv module both implement); Unicode NFC is Unicode Standard
Annex #15.
"""
from __future__ import annotations

import csv
import io
import json
import unicodedata

import duckdb
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from helpers import query, write_csv, write_jsonl
from hopper.api import Hopper
from hopper.errors import InputError
from hopper.load import MAX_TEXT, stage_files
from hopper.questions import make_question, read_questions


def facts(store_path):
    return query(store_path, "SELECT subject, relation, object, text, source, source_id "
                             "FROM facts ORDER BY fact_id")


# -- each format ---------------------------------------------------------------------------

def test_csv_with_optional_columns_stores_every_field_and_a_unit_vector(tmp_path):
    f = write_csv(tmp_path / "f.csv", [
        ("Ada Lovelace", "born_in", "London", "Ada Lovelace was born in London.", "notes p.1", "a1"),
        ("London", "capital_of", "England", "", "", ""),
    ], header=("subject", "relation", "object", "text", "source", "id"))
    hp = Hopper(tmp_path / "s.duckdb")
    report = hp.load([f])
    assert report["facts_added"] == 2 and report["rows_read"] == 2 and report["rejected"] == 0
    assert facts(hp.path) == [
        ("Ada Lovelace", "born_in", "London", "Ada Lovelace was born in London.", "notes p.1", "a1"),
        # an empty optional cell is absent: text made from the triple, no source or id
        ("London", "capital_of", "England", "London capital of England", None, None),
    ]
    assert sorted(r[0] for r in query(hp.path, "SELECT name FROM entities")) == \
        ["Ada Lovelace", "England", "London"]
    assert sorted(r[0] for r in query(hp.path, "SELECT name FROM relations")) == ["born_in", "capital_of"]
    vecs = np.array([r[0] for r in query(hp.path, "SELECT embedding FROM fact_vectors ORDER BY fact_id")],
                    dtype=np.float32)
    assert vecs.shape == (2, 384)
    np.testing.assert_allclose(np.linalg.norm(vecs, axis=1), 1.0, atol=1e-4)
    info = hp.info()
    assert (info["facts"], info["entities"], info["relations"]) == (2, 3, 2)
    assert info["model"] == "all-MiniLM-L6-v2"


def test_tsv_loads_and_header_names_match_loosely(tmp_path):
    f = tmp_path / "f.tsv"
    f.write_text(" Subject \tRELATION\tObject\nKX-2041\tmade_by\tAcme, Inc.\n", encoding="utf-8")
    hp = Hopper(tmp_path / "s.duckdb")
    assert hp.load([f])["facts_added"] == 1
    assert facts(hp.path) == [("KX-2041", "made_by", "Acme, Inc.", "KX-2041 made by Acme, Inc.",
                               None, None)]


def test_parquet_written_by_duckdb_loads_with_non_text_columns(tmp_path):
    f = tmp_path / "f.parquet"
    con = duckdb.connect()
    con.execute("CREATE TABLE t AS SELECT * FROM (VALUES ('Ada', 'born_in', 'London', 7), "
                "('Ada', 'born_in', 'London', 8), ('Bob', 'age', '41', 9)) v(subject, relation, object, id)")
    con.execute("COPY t TO ? (FORMAT parquet)", [str(f)])
    con.close()
    hp = Hopper(tmp_path / "s.duckdb")
    report = hp.load([f])
    assert (report["facts_added"], report["duplicates"]) == (2, 1)
    assert facts(hp.path) == [("Ada", "born_in", "London", "Ada born in London", None, "7"),
                              ("Bob", "age", "41", "Bob age 41", None, "9")]


@pytest.mark.parametrize("suffix", [".jsonl", ".ndjson"])
def test_json_lines_load_and_numbers_become_text(tmp_path, suffix):
    f = tmp_path / f"f{suffix}"
    f.write_text('{"subject": "Eiffel Tower", "relation": "height_m", "object": 330}\n'
                 '\n'
                 '{"subject": "pi", "relation": "approx", "object": 3.50, "id": 12, "extra": [1]}\n'
                 '{"object": true, "relation": "is_open", "subject": "Louvre", "source": "guide"}\n',
                 encoding="utf-8")
    hp = Hopper(tmp_path / "s.duckdb")
    assert hp.load([f])["facts_added"] == 3
    assert facts(hp.path) == [
        ("Eiffel Tower", "height_m", "330", "Eiffel Tower height m 330", None, None),
        ("pi", "approx", "3.5", "pi approx 3.5", None, "12"),
        ("Louvre", "is_open", "true", "Louvre is open true", "guide", None),
    ]


# -- dedupe and incremental embedding ---------------------------------------------------------

def test_same_fact_twice_in_one_file_is_stored_once(tmp_path):
    f = write_csv(tmp_path / "f.csv", [("A", "r", "B"), (" A ", "r", "B  "), ("A", "r", "B")])
    hp = Hopper(tmp_path / "s.duckdb")
    report = hp.load([f])
    assert (report["rows_read"], report["facts_added"], report["duplicates"]) == (3, 1, 2)
    assert len(facts(hp.path)) == 1


def test_second_load_stores_each_fact_once_and_embeds_only_new_texts(tmp_path):
    hp = Hopper(tmp_path / "s.duckdb")
    first = write_csv(tmp_path / "a.csv", [("Ada", "born_in", "London"), ("London", "capital_of", "England")])
    r1 = hp.load([first])
    # 2 fact texts + 3 entity names + 2 relation names ("born in", "capital of")
    assert (r1["facts_added"], r1["embedded"]) == (2, 7)
    before = query(hp.path, "SELECT f.fact_id, f.content_hash, v.embedding FROM facts f "
                            "JOIN fact_vectors v USING (fact_id) ORDER BY fact_id")

    again = hp.load([first])
    assert (again["facts_added"], again["duplicates"], again["embedded"]) == (0, 2, 0)

    # the same facts in another format, plus one new fact with one new entity and relation
    second = write_jsonl(tmp_path / "b.jsonl", [
        {"subject": "Ada", "relation": "born_in", "object": "London"},
        {"subject": "Ada", "relation": "wrote", "object": "Notes"},
        {"subject": "London", "relation": "capital_of", "object": "England", "text": "other words"}])
    r2 = hp.load([second])
    assert (r2["facts_added"], r2["duplicates"], r2["entities_added"], r2["relations_added"]) == (1, 2, 1, 1)
    assert r2["embedded"] == 3  # "Ada wrote Notes", "Notes", "wrote"
    after = query(hp.path, "SELECT f.fact_id, f.content_hash, v.embedding FROM facts f "
                           "JOIN fact_vectors v USING (fact_id) ORDER BY fact_id")
    assert after[:2] == before  # old facts keep their ids and vectors
    assert len(after) == 3
    assert hp.info()["facts"] == 3
    assert query(hp.path, "SELECT count(*) FROM loads")[0][0] == 3


def test_same_fact_in_two_files_of_one_load_is_stored_once(tmp_path):
    a = write_csv(tmp_path / "a.csv", [("X", "r", "Y")])
    b = write_jsonl(tmp_path / "b.ndjson", [{"subject": "X", "relation": "r", "object": "Y"}])
    hp = Hopper(tmp_path / "s.duckdb")
    report = hp.load([a, b])
    assert (report["facts_added"], report["duplicates"]) == (1, 1)


# -- reported lines are the file's real lines ---------------------------------------------------

def test_blank_field_in_data_row_3_is_reported_at_file_line_4(tmp_path):
    f = tmp_path / "f.csv"
    f.write_text("subject,relation,object\nA,r,B\nC,r,D\nE,,F\nG,r,H\n", encoding="utf-8")
    with pytest.raises(InputError) as e:
        Hopper(tmp_path / "s.duckdb").load([f])
    assert (e.value.line, e.value.field) == (4, "relation")
    assert not (tmp_path / "s.duckdb").exists()


def test_line_counts_blank_lines_multiline_fields_and_crlf(tmp_path):
    f = tmp_path / "f.csv"
    # line 1 header; 2-4 one record whose text spans three lines; 5 blank; 6 good; 7 bad
    f.write_bytes(b'subject,relation,object,text\r\nA,r,B,"one\r\ntwo\r\nthree"\r\n\r\nC,r,D,\r\n'
                  b'E,r,   ,x\r\n')
    with pytest.raises(InputError) as e:
        Hopper(tmp_path / "s.duckdb").load([f])
    assert (e.value.line, e.value.field) == (7, "object")


def test_json_lines_problem_line_counts_blank_lines(tmp_path):
    f = tmp_path / "f.jsonl"
    f.write_text('{"subject": "A", "relation": "r", "object": "B"}\n\n   \n'
                 '{"subject": "A", "relation": "r", "object": ""}\n', encoding="utf-8")
    with pytest.raises(InputError) as e:
        Hopper(tmp_path / "s.duckdb").load([f])
    assert (e.value.line, e.value.field) == (4, "object")


def test_skip_invalid_loads_valid_rows_and_writes_rejected_csv_beside_input(tmp_path):
    f = tmp_path / "f.csv"
    f.write_text('subject,relation,object,text\n'             # 1
                 'A,r,B,\n'                                   # 2 good
                 ',r,C,\n'                                    # 3 blank subject
                 'D,"multi\nline",E,\n'                       # 4-5 good (a newline in a name is white space)
                 'F, \t ,G,\n'                                # 6 white-space relation
                 'H,r\n'                                      # 7 too few fields
                 f'I,r,J,{"x" * (MAX_TEXT + 1)}\n'             # 8 text too long
                 'K,r,L,\n', encoding="utf-8")                # 9 good
    hp = Hopper(tmp_path / "s.duckdb")
    report = hp.load([f], skip_invalid=True)
    assert (report["facts_added"], report["rejected"]) == (3, 4)
    out = tmp_path / "f.csv.rejected.csv"
    assert report["rejected_files"] == [str(out)]
    rows = list(csv.DictReader(out.open(encoding="utf-8")))
    assert [(r["line"], r["field"]) for r in rows] == \
        [("3", "subject"), ("6", "relation"), ("7", ""), ("8", "text")]
    assert all(r["reason"] for r in rows)
    assert "fields" in rows[2]["reason"] and str(MAX_TEXT) in rows[3]["reason"]
    assert [r[:3] for r in facts(hp.path)] == [("A", "r", "B"), ("D", "multi line", "E"), ("K", "r", "L")]


def test_skip_invalid_with_json_lines_names_malformed_and_non_object_lines(tmp_path):
    f = tmp_path / "f.jsonl"
    f.write_bytes(b'{"subject": "A", "relation": "r", "object": "B"}\n'
                  b'{"subject": "A",\n'
                  b'[1, 2]\n'
                  b'{"subject": "A", "relation": "r", "object": "\xff"}\n'
                  b'{"subject": "C", "relation": "r", "object": "D"}\n')
    report = Hopper(tmp_path / "s.duckdb").load([f], skip_invalid=True)
    assert (report["facts_added"], report["rejected"]) == (2, 3)
    rows = list(csv.DictReader((tmp_path / "f.jsonl.rejected.csv").open(encoding="utf-8")))
    assert [r["line"] for r in rows] == ["2", "3", "4"]
    assert "malformed JSON" in rows[0]["reason"] and "JSON object" in rows[1]["reason"]
    assert "UTF-8" in rows[2]["reason"]


# Property: any generated CSV either loads exactly its valid rows, each problem reported at its
# real line, or nothing else happens (staging only: no model, no store).
_cell = st.text(st.sampled_from(list('ab ,"\n\t;é東🙂')), max_size=6)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(rows=st.lists(st.tuples(_cell, _cell, _cell), min_size=1, max_size=8),
       blanks=st.lists(st.integers(0, 8), max_size=3))
def test_generated_csv_stages_exactly_its_valid_rows_at_their_lines(tmp_path, rows, blanks):
    def record(row):
        buf = io.StringIO()
        csv.writer(buf, lineterminator="\n").writerow(row)
        return buf.getvalue()

    text, line, lines = record(["subject", "relation", "object"]), 2, []
    for i, row in enumerate(rows):
        if i in blanks:  # a blank line before this record
            text, line = text + "\n", line + 1
        lines.append(line)
        text += record(row)
        line += record(row).count("\n")
    f = tmp_path / "g.csv"
    f.write_text(text, encoding="utf-8")

    def clean(v):
        return unicodedata.normalize("NFC", " ".join(v.split()))

    want_bad = {}
    for row, at in zip(rows, lines):
        for name, v in zip(("subject", "relation", "object"), row):
            if not clean(v):
                want_bad[at] = name
                break
    stage = stage_files([f])
    bad = dict(stage.execute("SELECT line, split_part(problem, '|', 1) FROM checked "
                             "WHERE problem IS NOT NULL").fetchall())
    assert bad == want_bad
    got = sorted(stage.execute("SELECT subject, relation, object FROM valid").fetchall())
    want = sorted({tuple(clean(v) for v in row) for row, at in zip(rows, lines) if at not in want_bad})
    assert got == want


# -- safety and Unicode ------------------------------------------------------------------------

SQLISH = ["Robert'); DROP TABLE facts;--", "x\" OR \"1\"=\"1", "a;b;c", "SELECT * FROM meta",
          "O'Brien", "'; DELETE FROM entities; --", "$1 ? %s {0}"]


def test_quotes_semicolons_and_sql_keywords_are_stored_verbatim(tmp_path):
    rows = [(s, "knows", SQLISH[(i + 1) % len(SQLISH)]) for i, s in enumerate(SQLISH)]
    f = write_csv(tmp_path / "f.csv", rows)
    j = write_jsonl(tmp_path / "f.jsonl", [{"subject": "Bobby", "relation": "note",
                                            "object": "Tables'); DROP TABLE meta;--",
                                            "text": "Robert'); DROP TABLE facts;-- said \"hi\""}])
    hp = Hopper(tmp_path / "s.duckdb")
    hp.load([f, j])
    stored = facts(hp.path)
    assert [r[:3] for r in stored] == rows + [("Bobby", "note", "Tables'); DROP TABLE meta;--")]
    assert stored[-1][3] == "Robert'); DROP TABLE facts;-- said \"hi\""
    assert {r[0] for r in query(hp.path, "SELECT name FROM entities")} >= set(SQLISH)
    tables = {r[0] for r in query(hp.path, "SELECT table_name FROM information_schema.tables")}
    assert {"facts", "meta", "entities"} <= tables
    # questions with the same text are read verbatim too
    q = tmp_path / "q.jsonl"
    write_jsonl(q, [{"question": "Who is Robert'); DROP TABLE facts;--?", "answer": SQLISH[1]}])
    [read] = read_questions(q)
    assert read.text == "Who is Robert'); DROP TABLE facts;--?" and read.answers == [SQLISH[1]]


UNICODE = [("東京", "首都_of", "日本"), ("Москва", "столица", "Россия"), ("القاهرة", "عاصمة", "مصر"),
           ("Ame\u0301lie", "likes", "Cafe\u0301 de Flore"),          # decomposed: e + combining acute
           ("👩‍🔬 Marie", "won", "🏅 Nobel Prize"), ("ज़", "अक्षर", "देवनागरी")]


def test_unicode_names_load_and_are_found_again_by_name(tmp_path):
    f = write_csv(tmp_path / "f.csv", UNICODE)
    hp = Hopper(tmp_path / "s.duckdb")
    assert hp.load([f])["facts_added"] == len(UNICODE)
    nfc = [tuple(unicodedata.normalize("NFC", v) for v in row) for row in UNICODE]
    assert [r[:3] for r in facts(hp.path)] == nfc
    # the same names in either normal form find the stored fact
    for s, r, o in UNICODE:
        for form in ("NFC", "NFD"):
            q = make_question({"subject": unicodedata.normalize(form, s),
                               "relation": unicodedata.normalize(form, r), "answer": o})
            rows = query(hp.path, "SELECT object FROM facts WHERE subject = ? AND relation = ?",
                         [q.subject, q.relation])
            assert rows == [(unicodedata.normalize("NFC", o),)]
            assert q.answers == [unicodedata.normalize("NFC", o)]
    from hopper.env import Graph
    graph = Graph.from_store(hp.store, use_cache=False)
    for s, _, o in nfc:
        assert graph.entity_index(s) is not None and graph.entity_index(o) is not None
    # loading the decomposed spelling again adds nothing
    g = write_jsonl(tmp_path / "g.jsonl", [{"subject": "Ame\u0301lie", "relation": "likes",
                                            "object": "Cafe\u0301 de Flore"}])
    assert hp.load([g])["facts_added"] == 0


# Property: a generated question file either reads exactly its questions, in order and at their
# lines, or is refused whole at its first bad line with the field at fault; nothing else happens.
_word = st.text(st.sampled_from(list("ab ?'\"é東🙂\t")), min_size=0, max_size=5)
_good_q = st.builds(lambda q, a: {"question": q, "answer": a},
                    _word.filter(lambda t: t.strip()), st.one_of(_word.filter(lambda t: t.strip()),
                                                                st.lists(_word.filter(lambda t: t.strip()),
                                                                         min_size=1, max_size=2)))
_bad_q = st.sampled_from([
    ('{"question": "Where?"}', "answer"), ('{"question": "Where?", "answer": 3}', "answer"),
    ('{"question": "Where?", "answer": []}', "answer"), ('{"question": "  ", "answer": "x"}', "question"),
    ('{"answer": "x"}', "question"), ('{"question": "Where?", "answer": ', None), ('[1]', None),
    ('{"subject": "A", "answer": "x"}', "relation")])


@settings(max_examples=80, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(lines=st.lists(st.one_of(_good_q.map(lambda o: ("good", o)), _bad_q.map(lambda b: ("bad", b)),
                                st.just(("blank", None))), min_size=1, max_size=8))
def test_generated_question_file_reads_exactly_its_questions_or_is_refused_at_the_first_bad_line(tmp_path, lines):
    text, want, first_bad = "", [], None
    for n, (kind, value) in enumerate(lines, start=1):
        if kind == "good":
            text += json.dumps(value, ensure_ascii=False) + "\n"
            answers = value["answer"] if isinstance(value["answer"], list) else [value["answer"]]
            want.append((n, unicodedata.normalize("NFC", " ".join(value["question"].split())),
                         [unicodedata.normalize("NFC", " ".join(a.split())) for a in answers]))
        elif kind == "bad":
            text += value[0] + "\n"
            first_bad = first_bad or (n, value[1])
        else:
            text += "   \n"
    f = tmp_path / "q.jsonl"
    f.write_text(text, encoding="utf-8")
    if first_bad is None and want:
        got = read_questions(f)
        assert [(q.line, q.text, q.answers) for q in got] == want
    else:
        with pytest.raises(InputError) as e:
            read_questions(f)
        if first_bad is None:
            assert "no questions" in str(e.value)
        else:
            assert (e.value.line, e.value.field) == first_bad


# ---------------------------------------------------------------------------- precision

def _vectors(path, sql):
    return np.array([r[0] for r in query(path, sql)], dtype=np.float32)


def test_a_new_store_is_embedded_in_int8_and_stays_so(tmp_path):
    from hopper import embed

    hp = Hopper(tmp_path / "s.duckdb")
    hp.load([write_csv(tmp_path / "a.csv", [("KX-2041", "made_by", "Acme, Inc.")])])
    assert hp.info()["model_precision"] == "int8"
    hp.load([write_csv(tmp_path / "b.csv", [("KX-2042", "made_by", "Bolt Works")])])
    assert hp.info()["model_precision"] == "int8"
    # int8 vectors (which depend a little on their batch mates, so they are not recomputed
    # here): close to fp32 ones, and not them.
    texts = [r[0] for r in query(hp.path, "SELECT text FROM facts ORDER BY fact_id")]
    fp32 = embed.Encoder("fast").encode(texts)
    got = _vectors(hp.path, "SELECT embedding FROM fact_vectors ORDER BY fact_id")
    assert np.sum(got * fp32, axis=1).min() >= 0.96
    assert np.abs(got - fp32).max(axis=1).min() > 1e-4


def test_an_fp32_store_keeps_loading_fp32_and_refuses_int8(tmp_path):
    # Stores made before precisions were recorded hold fp32 vectors and have no
    # model_precision: they go on loading with the fp32 encoder; int8 is refused.
    from hopper import embed
    from hopper.load import load
    from hopper.store import Store

    path = tmp_path / "s.duckdb"
    load(Store(path), [write_csv(tmp_path / "a.csv", [("KX-2041", "made_by", "Acme, Inc.")])],
         encoder=embed.Encoder("auto"))
    assert Hopper(path).info()["model_precision"] == "fp32"
    con = duckdb.connect(str(path))
    con.execute("DELETE FROM meta WHERE key = 'model_precision'")
    con.close()
    assert Hopper(path).info()["model_precision"] == "fp32"
    before = query(path, "SELECT fact_id, embedding FROM fact_vectors ORDER BY fact_id")
    with pytest.raises(InputError, match="precisions are not mixed"):
        load(Store(path), [write_csv(tmp_path / "b.csv", [("KX-2042", "made_by", "Bolt Works")])],
             encoder=embed.Encoder("fast", precision="int8"))
    assert query(path, "SELECT fact_id, embedding FROM fact_vectors ORDER BY fact_id") == before
    hp = Hopper(path)
    hp.load([tmp_path / "b.csv"])
    got = _vectors(path, "SELECT embedding FROM fact_vectors ORDER BY fact_id")
    texts = [r[0] for r in query(path, "SELECT text FROM facts ORDER BY fact_id")]
    np.testing.assert_allclose(got, embed.Encoder("fast").encode(texts), atol=1e-5)

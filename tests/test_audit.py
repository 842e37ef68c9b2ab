"""Tests of hopper.audit: recorded runs read back, replayed, explained by counterfactuals, and shown as text and HTML.

The small fact table is invented here.  Most runs use the untrained ``walk`` strategy on a store
without a policy (two hops, deterministic): a policy trained on a handful of questions in a few
seconds does not reliably learn the 2-hop chain, and these tests are about the audit trail, not
about the policy.  One fixture trains a tiny policy anyway, to check that a ``policy`` run replays
to the same fetch sequence.
"""

import html
import json
import os
import shutil
import subprocess
import unicodedata
from html.parser import HTMLParser
from pathlib import Path

import pytest

import hopper
from helpers import REPO, run_cli, write_csv
from hopper import audit
from hopper.errors import InputError

MARKUP_TEXT = "The Zolt bracket is made by Hask & \"Dunmore\" <script>alert(1)</script> 'per order'"
MARKUP_SOURCE = "orders <2024> & co"
# (subject, relation, object, text, source); each maker makes one part and is based in one city,
# so a 2-hop walk from a part through its maker reaches the maker's city.
FACTS = [
    ("Tarvel pump", "made by", "Ostrel Works", "", "orders-2024 line 4"),
    ("Ostrel Works", "based in", "Quarnby", "", "registry p. 2"),
    ("Tarvel pump", "stored in", "Lunfield", "", "depot list"),
    ("Mirren gasket", "made by", "Brannock Tooling", "", "orders-2024 line 9"),
    ("Brannock Tooling", "based in", "Morrowgate", "", "registry p. 5"),
    ("Mirren gasket", "stored in", "Eskerhame", "", "depot list"),
    ("Zolt bracket", "made by", "Hask & \"Dunmore\"", MARKUP_TEXT, MARKUP_SOURCE),
    ("Hask & \"Dunmore\"", "based in", "Thessaly Point", "", "registry p. 7"),
    # A text of its own: the generated "Zolt bracket stored in Varrow Dock" was as close to
    # the city question as the maker's fact (0.594 / 0.603 with fp32 vectors, 0.607 / 0.604
    # with the int8 ones loads make), a near tie the walk could take either way.
    ("Zolt bracket", "stored in", "Varrow Dock", "Spare Zolt brackets are kept at Varrow Dock.",
     "depot list"),
    ("Quarnby", "located in", "Eastmarch", "", "atlas"),
    ("Morrowgate", "located in", "Westfold", "", "atlas"),
]
PARTS = [("Tarvel pump", "Ostrel Works", "Quarnby"), ("Mirren gasket", "Brannock Tooling", "Morrowgate"),
         ("Zolt bracket", "Hask & \"Dunmore\"", "Thessaly Point")]


def city_question(part):
    return f"In which city is the company that makes the {part} based?"


def write_facts(path: Path, rows=FACTS) -> Path:
    return write_csv(path, rows, header=("subject", "relation", "object", "text", "source"))


def make_store(folder: Path):
    hp = hopper.open_store(folder / "store.duckdb")
    hp.load([write_facts(folder / "facts.csv")], progress=False)
    return hp


@pytest.fixture(scope="module")
def hp(tmp_path_factory):
    """A store without a policy: ``walk`` takes its default two hops."""
    return make_store(tmp_path_factory.mktemp("audit-walk"))


@pytest.fixture(scope="module")
def policy_hp(tmp_path_factory):
    """A store with a tiny trained policy."""
    h = make_store(tmp_path_factory.mktemp("audit-policy"))
    qs = []
    for part, maker, city in PARTS:
        qs.append({"question": city_question(part), "answer": city, "hops": 2})
        qs.append({"question": f"Who makes the {part}?", "answer": maker, "hops": 1})
    # About 3 s; it learns the 1-hop "who makes" step but not the 2-hop chain.
    h.train(qs[:4], valid=qs[4:], seed=0, max_hops=2, epochs=10, rollouts=8, batch_questions=4,
            hidden=16, patience=10, lr=0.01, progress=False)
    h.eval_questions = qs
    return h


# -- recording and replay ---------------------------------------------------------------------------
def test_walk_run_replays_to_same_fetches(hp):
    doc = hp.ask(city_question("Tarvel pump"), strategy="walk")
    assert doc["answer"] == "Quarnby"
    assert [f["to"] for f in doc["fetches"]] == ["Ostrel Works", "Quarnby"]
    res = audit.replay(hp, doc["run_id"])
    assert res["same_answer"] and res["same_fetches"]
    assert res["fetches_then"] == [f["fact_id"] for f in doc["fetches"]] == res["fetches_now"]
    assert res["facts_version_then"] == res["facts_version_now"]
    text = audit.format_replay(res)
    assert "same answer, same fetches" in text


def test_policy_run_replays_to_same_fetches(policy_hp):
    docs = policy_hp.ask_many([q["question"] for q in policy_hp.eval_questions], strategy="policy")
    assert all(d["policy_version"] == 1 for d in docs)
    assert any(d["fetches"] for d in docs), "the tiny policy fetched nothing at all"
    fresh = hopper.open_store(policy_hp.path)  # a new handle: nothing cached from the ask
    for doc in docs:
        res = audit.replay(fresh, doc["run_id"])
        assert res["same_fetches"] and res["same_answer"], doc["question"]
        assert res["fetches_now"] == [f["fact_id"] for f in doc["fetches"]]
        assert res["policy_version"] == 1


def test_replay_reports_facts_loaded_since(tmp_path):
    h = make_store(tmp_path)
    doc = h.ask(city_question("Tarvel pump"), strategy="walk")
    extra = write_facts(tmp_path / "more.csv", [("Fennick hinge", "made by", "Ostrel Works", "", "late order")])
    h.load([extra], progress=False)
    res = audit.replay(h, doc["run_id"])
    assert res["facts_version_now"] > res["facts_version_then"]
    assert res["answer_then"] == "Quarnby"
    assert "facts were loaded since the run" in audit.format_replay(res)


def test_run_records_everything_the_issue_lists(hp):
    doc = hp.ask(city_question("Mirren gasket"), strategy="walk")
    run = audit.read_run(hp.store, doc["run_id"])
    for key in ("run_id", "created_at", "question", "subject", "relation", "strategy", "policy_version",
                "answer", "confidence", "abstained", "reason", "ranked", "start_entities",
                "elapsed_ms", "fetches"):
        assert key in run
    assert run["start_entities"] == ["Mirren gasket"]
    assert run["created_at"].endswith("Z")
    first = run["fetches"][0]
    assert first["from"] == "Mirren gasket" and first["to"] == "Brannock Tooling"
    assert first["direction"] == "forward"
    assert first["source"] == "orders-2024 line 9"
    assert first["alternatives"] and all(set(a) == {"fact_id", "text", "probability"}
                                         for a in first["alternatives"])


# -- audit --json against ask --json ------------------------------------------------------------------
def test_audit_json_matches_ask_json(hp):
    store = str(hp.path)
    rc, out, _ = run_cli("ask", city_question("Zolt bracket"), "--strategy", "walk", "--json", "--store", store)
    assert rc == 0
    asked = json.loads(out)
    rc, out, _ = run_cli("audit", asked["run_id"], "--json", "--store", store)
    assert rc == 0
    audited = json.loads(out)
    shared = (set(asked) & set(audited)) - {"fetches"}
    assert {"run_id", "question", "answer", "confidence", "abstained", "ranked", "strategy",
            "policy_version", "start_entities", "elapsed_ms"} <= shared
    for key in shared:
        assert audited[key] == asked[key], key
    assert len(audited["fetches"]) == len(asked["fetches"]) == 2
    for a, b in zip(asked["fetches"], audited["fetches"]):
        assert set(a) <= set(b), set(a) - set(b)
        for key in a:
            assert b[key] == a[key], key
    # a unique prefix of at least six characters finds the same run
    rc, out, _ = run_cli("audit", asked["run_id"][:8], "--json", "--store", store)
    assert rc == 0 and json.loads(out)["run_id"] == asked["run_id"]


def test_unknown_or_too_short_run_id_is_refused(hp):
    with pytest.raises(InputError, match="no recorded run 'nosuchrun'.*audit --list"):
        audit.read_run(hp.store, "nosuchrun")
    doc = hp.ask(city_question("Tarvel pump"), strategy="walk")
    with pytest.raises(InputError, match="audit --list"):
        audit.read_run(hp.store, doc["run_id"][:4])
    assert run_cli("audit", "nosuchrun", "--store", hp.path)[0] == 2


# -- listing --------------------------------------------------------------------------------------------
def test_list_newest_first_and_filters(hp):
    a = hp.ask("Who makes the Tarvel pump?", strategy="walk")
    b = hp.ask(city_question("Zolt bracket"), strategy="walk")
    runs = audit.list_runs(hp.store, limit=2)
    assert [r["run_id"] for r in runs] == [b["run_id"], a["run_id"]]
    assert runs[0]["fetches"] == len(b["fetches"])
    got = audit.list_runs(hp.store, contains="ZOLT BRACKET")
    assert b["run_id"] in {r["run_id"] for r in got} and a["run_id"] not in {r["run_id"] for r in got}
    got = audit.list_runs(hp.store, answer="thessaly point")
    assert got and all(r["answer"] == "Thessaly Point" for r in got)
    assert audit.list_runs(hp.store, abstained=True) == []
    assert len(audit.list_runs(hp.store, abstained=False, limit=1000)) >= 2
    assert audit.list_runs(hp.store, since="2999-01-01") == []
    assert len(audit.list_runs(hp.store, since="2000-01-01", limit=1000)) >= 2
    for bad in ("2024-13-01", "yesterday", "2024-1-5"):
        with pytest.raises(InputError, match="--since"):
            audit.list_runs(hp.store, since=bad)
    rc, out, _ = run_cli("audit", "--list", "--json", "--contains", "Tarvel", "--store", str(hp.path))
    assert rc == 0 and a["run_id"] in {r["run_id"] for r in json.loads(out)}
    text = audit.format_list(runs)
    assert b["run_id"] in text.splitlines()[1]


def test_list_filter_text_is_data_not_sql(hp):
    # the filter values are bound parameters: quotes and LIKE wildcards match only themselves
    assert audit.list_runs(hp.store, contains="' OR 1=1 --") == []
    assert audit.list_runs(hp.store, contains="%") == []
    assert audit.list_runs(hp.store, answer="x' OR '1'='1") == []


# -- terminal text ----------------------------------------------------------------------------------------
def test_format_run_shows_path_steps_and_alternatives(hp):
    doc = hp.ask(city_question("Tarvel pump"), strategy="walk")
    text = audit.format_run(audit.read_run(hp.store, doc["run_id"]))
    assert "Tarvel pump --made by--> Ostrel Works --based in--> Quarnby" in text
    assert "orders-2024 line 4" in text
    assert "beat: Tarvel pump stored in Lunfield" in text
    assert "Quarnby" in text.splitlines()[2]
    assert "only as good as the loaded facts and the trained policy" in text.splitlines()[-1]


def test_terminal_widths_follow_unicode():
    # East Asian Width per Unicode Standard Annex #11; combining marks take no column.
    assert audit.text_width("東京") == 4
    assert audit.text_width("e\u0301") == 1
    assert audit.text_width("Zürich") == 6
    runs = [
        {"run_id": "r1", "created_at": "2025-01-01T00:00:00Z", "question": "q1", "answer": "東京タワー",
         "confidence": 0.9, "abstained": False, "strategy": "walk", "fetches": 2},
        {"run_id": "r2", "created_at": "2025-01-01T00:00:00Z", "question": "q2", "answer": "Cafe\u0301 Noir",
         "confidence": 0.5, "abstained": False, "strategy": "walk", "fetches": 1},
        {"run_id": "r3", "created_at": "2025-01-01T00:00:00Z", "question": "q3", "answer": None,
         "confidence": 0.1, "abstained": True, "strategy": "policy", "fetches": 0},
    ]
    lines = audit.format_list(runs).splitlines()
    cols = set()
    for line in lines[1:]:
        head = line[: line.index(" q")]
        cols.add(audit.text_width(head))
    assert len(cols) == 1, lines


def test_terminal_text_neutralises_control_characters():
    run = {"run_id": "x", "question": "evil\x1b[2J question", "answer": "A\x1b]0;title\x07",
           "confidence": 1.0, "abstained": False, "strategy": "walk", "fetches": []}
    text = audit.format_run(run)
    assert "\x1b" not in text and "\x07" not in text


def test_format_eval_side_by_side():
    block = {"n": 4, "hits1": 0.75, "mrr": 0.8, "mean_fetches": 1.5, "ms_per_question": 2.0, "abstained": 0.0}
    res = {"questions": 4, "policy_version": 3, "strategies": {
        "policy": dict(block, by_hops={"1": dict(block, n=2), "2": dict(block, n=2, hits1=0.5)}),
        "greedy": dict(block, hits1=0.25, by_hops={"1": dict(block, n=2), "2": dict(block, n=2, hits1=0.0)}),
        "walk": dict(block, hits1=0.5, by_hops={"1": dict(block, n=2), "2": None})}}
    lines = audit.format_eval(res).splitlines()
    header = next(l for l in lines if "policy v3" in l)
    assert header.index("policy v3") < header.index("greedy") < header.index("walk")
    hits = [l for l in lines if l.startswith("  Hits@1")]
    assert len(hits) == 3  # overall, 1 hop, 2 hops
    assert hits[0].split()[1:] == ["0.750", "0.250", "0.500"]
    assert hits[2].split()[1:] == ["0.500", "0.000", "-"]
    assert len({len(l) for l in hits}) == 1  # right-aligned columns
    assert any(l.startswith("2 hops (n=2)") for l in lines)


def test_format_eval_of_a_real_evaluation(policy_hp):
    res = policy_hp.evaluate(policy_hp.eval_questions)
    text = audit.format_eval(res)
    assert "1 hop (n=3)" in text and "2 hops (n=3)" in text


# -- HTML ----------------------------------------------------------------------------------------------------
class _Collect(HTMLParser):
    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.tags, self.text, self.attrs = [], [], []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        self.attrs += attrs

    def handle_data(self, data):
        self.text.append(data)


@pytest.fixture(scope="module")
def markup_page(hp, tmp_path_factory):
    doc = hp.ask(city_question("Zolt bracket"), strategy="walk")
    assert doc["fetches"][0]["text"] == MARKUP_TEXT
    path = tmp_path_factory.mktemp("html") / "audit.html"
    assert audit.write_html(audit.read_run(hp.store, doc["run_id"]), path) == str(path)
    return path


def test_html_escapes_fact_text(markup_page):
    page = markup_page.read_text("utf-8")
    assert "<script" not in page.lower()
    assert "alert(1)</script>" not in page
    assert 'Hask & "Dunmore"' not in page
    assert "'per order'" not in page
    assert MARKUP_SOURCE not in page
    assert html.escape(MARKUP_TEXT, quote=True) in page
    assert html.escape(MARKUP_SOURCE, quote=True) in page
    # escaped exactly once: a parser reads the original text back (HTML character references)
    p = _Collect()
    p.feed(page)
    text = "".join(p.text)
    assert MARKUP_TEXT in text and MARKUP_SOURCE in text
    assert "script" not in p.tags


def test_html_is_self_contained_with_svg_path(markup_page):
    page = markup_page.read_text("utf-8")
    p = _Collect()
    p.feed(page)
    assert "svg" in p.tags and "table" in p.tags
    assert not {"script", "link", "img", "iframe", "object", "embed"} & set(p.tags)
    for name, value in p.attrs:
        if name in ("src", "href"):
            pytest.fail(f"external reference {name}={value!r}")
    assert "@import" not in page and "url(http" not in page
    assert "default-src 'none'" in page  # the page may not load anything at all
    assert page.count('class="entity"') == 3 and page.count('class="step"') == 2
    assert 'class="alt"' in page and "stroke-dasharray" in page
    assert "registry p. 7" in page  # sources listed
    assert not list(markup_page.parent.glob(".hopper-audit-*"))  # no temp file left behind


def test_write_html_refuses_a_missing_folder(hp, tmp_path):
    doc = hp.ask("Who makes the Mirren gasket?", strategy="walk")
    run = audit.read_run(hp.store, doc["run_id"])
    with pytest.raises(InputError, match="does not exist"):
        audit.write_html(run, tmp_path / "no" / "such" / "page.html")
    with pytest.raises(InputError, match="folder"):
        audit.write_html(run, tmp_path)
    assert run_cli("audit", doc["run_id"], "--html", tmp_path / "nope" / "x.html", "--store", hp.path)[0] == 2


@pytest.mark.skipif(shutil.which("chromium") is None, reason="chromium is not installed (apt-get install chromium)")
def test_screenshot_shows_the_path_picture(markup_page, tmp_path):
    out = tmp_path / "shot.png"
    proc = subprocess.run([str(REPO / "scripts" / "screenshot_audit"), str(markup_page), str(out)],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    data = out.read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n"  # PNG file signature (PNG specification, ISO/IEC 15948)
    import matplotlib.image as mpimg
    import numpy as np
    img = mpimg.imread(out)[:, :, :3]
    assert img.shape[:2] == (900, 1200)
    # the path's arrows and the first node's border are drawn in #2b5797
    blue = np.abs(img - np.array([0x2B, 0x57, 0x97]) / 255.0).max(-1) < 0.08
    assert blue.sum() > 200
    # the answer node is filled #e6f4ea
    green = np.abs(img - np.array([0xE6, 0xF4, 0xEA]) / 255.0).max(-1) < 0.02
    assert green.sum() > 1000


# -- why this answer ------------------------------------------------------------------------------------------
def test_counterfactual_names_bridge_fact_necessary(hp):
    doc = hp.ask(city_question("Mirren gasket"), strategy="walk")
    assert doc["answer"] == "Morrowgate"
    bridge = next(f for f in doc["fetches"] if f["to"] == "Brannock Tooling")
    res = audit.counterfactual(hp, doc["run_id"])
    assert res["answer"] == "Morrowgate" and res["answer_now"] == "Morrowgate"
    by_id = {f["fact_id"]: f for f in res["facts"]}
    assert set(by_id) == {f["fact_id"] for f in doc["fetches"]}
    assert by_id[bridge["fact_id"]]["necessary"] is True
    assert by_id[bridge["fact_id"]]["answer_without"] != "Morrowgate"
    text = audit.format_counterfactual(res)
    assert "needed" in text and str(bridge["fact_id"]) in text
    # the CLI prints the same as JSON
    rc, out, _ = run_cli("audit", doc["run_id"], "--counterfactual", "--json", "--store", str(hp.path))
    assert rc == 0 and json.loads(out)["facts"] == json.loads(json.dumps(res["facts"]))


def test_counterfactual_does_not_record_runs(hp):
    doc = hp.ask(city_question("Tarvel pump"), strategy="walk")
    before = hp.info()["runs"]
    audit.counterfactual(hp, doc["run_id"])
    audit.replay(hp, doc["run_id"])
    assert hp.info()["runs"] == before


def test_module_docstring_is_one_line():
    first = (REPO / "hopper" / "audit.py").read_text("utf-8").splitlines()[0]
    assert first.startswith('"""') and first.endswith('"""') and len(first) > 6
    assert unicodedata.normalize("NFC", first) == first
    assert os.access(REPO / "scripts" / "screenshot_audit", os.X_OK)

"""Unicode end to end: facts and questions in Greek, Cyrillic, CJK, Arabic, with combining marks and emoji.

They load, train a (tiny) policy, answer from the command line and audit: the same text comes
back in JSON, escaped exactly once in HTML, and aligned by display width in the terminal.
Display widths are measured here independently of hopper's own ``audit.text_width``: Unicode
Standard Annex #11 (East Asian Width) through the standard library's ``unicodedata`` tables, with
combining marks taking no column; normal forms follow Unicode Standard Annex #15.  All names are
invented.
"""
from __future__ import annotations

import json
import unicodedata
from html.parser import HTMLParser

import duckdb
import pytest

import hopper
from helpers import run_cli, write_csv, write_jsonl
from hopper import audit

# part -> (maker, city where the maker is based, depot); every script once, some mixed
PARTS = {
    "Αντλία Ζέτα-7": ("Εργαστήρια Κορφού", "Θεσσαλονίκη", "Αποθήκη Άλφα"),
    "Насос Вега-3": ("Завод Орлов", "Новгород", "Склад Север"),
    "泵 甲型-12": ("東方機械", "大阪", "倉庫 南"),
    "مضخة نور-5": ("مصنع الفجر", "الإسكندرية", "مستودع الشرق"),
    "Pompe Ame\u0301lie": ("Atelier Cafe\u0301 Noe\u0308l", "Ma\u0301laga", "De\u0301po\u0302t Su\u0308d"),
    "🚀 Rocket pump": ("🏭 Starworks", "🌆 Neon City", "📦 Depot 9"),
}
# the 1-hop question in the part's own language
WHO = {
    "Αντλία Ζέτα-7": "Ποιος κατασκευάζει το {} ;", "Насос Вега-3": "Кто производит {} ?",
    "泵 甲型-12": "誰 が {} を 作る ?", "مضخة نور-5": "من يصنع {} ؟",
    "Pompe Ame\u0301lie": "Qui fabrique la {} ?", "🚀 Rocket pump": "Who makes the {} ?",
}


def nfc(text: str) -> str:
    return unicodedata.normalize("NFC", text)


def display_width(text: str) -> int:
    """Terminal columns of ``text`` by Unicode Standard Annex #11 (East Asian Width): a character
    whose East_Asian_Width is W (wide) or F (fullwidth) takes two columns; a combining mark
    (non-zero canonical combining class, or general category Mn or Me) takes none; anything
    else one.  Read from the standard library's ``unicodedata`` tables, not from hopper."""
    cols = 0
    for ch in text:
        if unicodedata.combining(ch) or unicodedata.category(ch) in ("Mn", "Me"):
            continue
        cols += 2 if unicodedata.east_asian_width(ch) in ("W", "F") else 1
    return cols


def test_the_width_oracle_on_hand_worked_strings():
    """Columns counted by hand from the rules above, not by any program (the emoji's wide
    class from memory: emoji presentation characters became W in Unicode 9.0)."""
    assert display_width("泵 甲型-12") == 10       # 3 ideographs x 2 + space, hyphen, 2 digits
    assert display_width("Ame\u0301lie") == 6     # the combining acute takes no column
    assert display_width("🚀 Rocket") == 9         # the emoji is East Asian Wide (Unicode 9.0 on)
    assert display_width("Насос Вега-3") == 12     # Cyrillic: one column each
    assert display_width("ＡＢ") == 4               # fullwidth Latin letters


def test_hoppers_widths_agree_with_the_oracle():
    for text in [*PARTS, *(x for v in PARTS.values() for x in v), *WHO.values(), "Ame\u0301lie", "ＡＢ"]:
        assert audit.text_width(text) == display_width(text), text


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    folder = tmp_path_factory.mktemp("unicode")
    rows = []
    for part, (maker, city, depot) in PARTS.items():
        rows += [(part, "made by", maker, f"{part} ✓ is made by {maker} — «{maker}»", f"реестр 📄 {part}"),
                 (maker, "based in", city, "", ""), (part, "stored in", depot, "", "")]
    path = write_csv(folder / "facts.csv", rows, header=("subject", "relation", "object", "text", "source"))
    questions = write_jsonl(folder / "questions.jsonl",
                            [{"question": WHO[part].format(part), "answer": maker}
                             for _ in range(3) for part, (maker, _, _) in PARTS.items()])
    store = folder / "store.duckdb"
    assert run_cli("load", path, "--store", store)[0] == 0
    rc, out, _ = run_cli("train", "--questions", questions, "--valid", questions, "--epochs", "6",
                      "--max-hops", "2", "--json", "--store", store)
    assert rc == 0
    return store, json.loads(out)


def test_facts_are_stored_in_nfc_and_found_by_either_form(store):
    path, _ = store
    hp = hopper.open_store(path)
    assert hp.info()["facts"] == 3 * len(PARTS)
    for part, (maker, _, _) in PARTS.items():
        for form in ("NFC", "NFD"):
            doc = hp.ask(subject=unicodedata.normalize(form, part), relation="made by",
                         strategy="walk", record=False)
            assert doc["start_entities"] == [nfc(part)]
            assert doc["fetches"][0]["from"] == nfc(part)
    con = duckdb.connect(str(path), read_only=True)
    try:
        texts = {r[0] for r in con.execute("SELECT text FROM facts").fetchall()}
    finally:
        con.close()
    for part, (maker, _, _) in PARTS.items():
        assert nfc(f"{part} ✓ is made by {maker} — «{maker}»") in texts


def test_questions_in_every_script_are_answered_from_the_command_line(store):
    """The policy, trained on exactly these questions, answers every one; the untrained walk
    (similarity to the question, which this English sentence model reads poorly in other
    scripts) must at least start from the named part."""
    path, summary = store
    assert summary["epochs"] >= 1 and summary["version"] == 1
    for strategy in ("policy", "walk"):
        for part, (maker, _, _) in PARTS.items():
            rc, out, _ = run_cli("ask", WHO[part].format(part), "--strategy", strategy, "--json",
                              "--store", path)
            assert rc == 0
            doc = json.loads(out)
            assert doc["question"] == nfc(WHO[part].format(part))
            assert doc["start_entities"] == [nfc(part)] and doc["fetches"][0]["from"] == nfc(part)
            if strategy == "policy":
                assert doc["answer"] == nfc(maker), (part, doc["answer"])


class _Text(HTMLParser):
    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.chunks = []

    def handle_data(self, data):
        self.chunks.append(data)


def test_audit_shows_the_same_text_in_json_html_and_an_aligned_terminal_table(store, tmp_path):
    path, _ = store
    hp = hopper.open_store(path)
    ids = {}
    for part in PARTS:
        ids[part] = hp.ask(WHO[part].format(part))["run_id"]
    for part, (maker, _, _) in PARTS.items():
        rid = ids[part]
        rc, out, _ = run_cli("audit", rid, "--json", "--store", path)
        assert rc == 0
        run = json.loads(out)
        assert run["answer"] == nfc(maker)
        text = nfc(f"{part} ✓ is made by {maker} — «{maker}»")
        assert run["fetches"][0]["text"] == text
        # HTML: a parser reads back exactly the stored text (escaped once, UTF-8 declared)
        page = tmp_path / f"{rid}.html"
        assert run_cli("audit", rid, "--html", page, "--store", path)[0] == 0
        raw = page.read_text("utf-8")
        assert '<meta charset="utf-8">' in raw and "«" in raw
        p = _Text()
        p.feed(raw)
        seen = "".join(p.chunks)
        assert text in seen and nfc(maker) in seen and nfc(f"реестр 📄 {part}") in seen
        # terminal: the step table's columns line up by display width
        rc, out, _ = run_cli("audit", rid, "--store", path)
        assert rc == 0 and text in out
        lines = out.splitlines()
        head = next(i for i, line in enumerate(lines) if line.lstrip().startswith("hop"))
        rows = [lines[head]] + [line for line in lines[head + 1:] if line[:5].strip().isdigit()]
        assert len(rows) == 1 + len(run["fetches"])
        cells = ["source"] + [f.get("source") or "-" for f in run["fetches"]]  # the last column
        assert all(r.endswith(c) for r, c in zip(rows, cells)), rows
        starts = {display_width(r) - display_width(c) for r, c in zip(rows, cells)}
        assert len(starts) == 1, rows
    # the list view lines up too, whatever the scripts in the answers
    rc, out, _ = run_cli("audit", "--list", "--store", path)
    lines = out.splitlines()
    cols = {display_width(line[: line.index(" policy ")]) for line in lines[1:] if " policy " in line}
    assert len(lines) > len(PARTS)
    assert len(cols) == 1, lines

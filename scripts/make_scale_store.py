#!/usr/bin/env python3
"""Generate a large invented fact table for benchmarks: the demo facts plus renamed copies of them.

The demo facts (``factstores/supply/facts.csv``) come first and unchanged, so the demo
questions and their gold answers still hold.  The filler is made of copies of the demo
world in which every invented word is replaced by a fresh syllable name (part and
certificate codes get a copy number), so a copy touches no demo entity and no name of a
demo question; the copies keep the demo's shape (degrees, look-alike traps, relations).
Seeded: the same arguments give byte-identical output.

Usage:  python scripts/make_scale_store.py --facts 100000 --out .bench/facts-100k.csv
"""
from __future__ import annotations

import argparse
import csv
import json
import random
import re
import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
import make_demo_store as demo  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "factstores" / "supply"
SEED = 20260601

# Words the demo generator uses as fixed parts of names (kept as they are in copies).
GENERIC = {w for pair in demo.SUPPLIER_SUFFIX_PAIRS for w in pair}
GENERIC |= {w for s in demo.AUDITOR_SUFFIXES + demo.ASSEMBLY_NOUNS for w in s.split()}
GENERIC |= {w for s in demo.PORT_FORMS for w in s.replace("{}", "").split()}
_CODE = re.compile(r"^([A-Z]+)-(\d+)$")


def _vocabulary() -> set[str]:
    """Every word (case-folded) of the demo facts and questions: fresh names avoid them."""
    words: set[str] = set()
    with open(DEMO / "facts.csv", newline="", encoding="utf-8") as f:
        for row in csv.DictReader(f):
            for col in ("subject", "object", "text"):
                words.update(w.strip("?.,'").casefold() for w in row[col].split())
    for split in ("train", "valid", "test"):
        with open(DEMO / f"questions_{split}.jsonl", encoding="utf-8") as f:
            for line in f:
                words.update(w.strip("?.,'").casefold() for w in json.loads(line)["question"].split())
    return words


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--facts", type=int, required=True, help="total facts (demo + filler)")
    ap.add_argument("--out", type=Path, required=True)
    ap.add_argument("--seed", type=int, default=SEED)
    args = ap.parse_args(argv)
    with open(DEMO / "facts.csv", newline="", encoding="utf-8") as f:
        base = list(csv.DictReader(f))
    if args.facts < len(base):
        raise SystemExit(f"--facts must be at least the {len(base)} demo facts")
    rng = random.Random(args.seed)
    names = demo.Names(rng)
    vocab = _vocabulary()
    names.stems |= {w.capitalize() for w in vocab}

    def fresh(word: str, copy: int, mapping: dict) -> str:
        if word in GENERIC:
            return word
        m = _CODE.match(word)
        if m:  # KX-2041 -> KX7-2041, CERT-12345 -> CERT7-12345
            return f"{m.group(1)}{copy}-{m.group(2)}"
        if word not in mapping:
            while True:
                s = names.stem((2, 3))
                if s.casefold() not in vocab:
                    break
            mapping[word] = s
        return mapping[word]

    rows = [[r["id"], r["subject"], r["relation"], r["object"], r["text"], r["source"]]
            for r in base]
    copy = 0
    while len(rows) < args.facts:
        copy += 1
        mapping: dict[str, str] = {}
        for r in base:
            if len(rows) >= args.facts:
                break
            s = " ".join(fresh(w, copy, mapping) for w in r["subject"].split())
            o = " ".join(fresh(w, copy, mapping) for w in r["object"].split())
            text = demo.REL_TEXT[r["relation"]].format(s=s, o=o)
            rows.append([f"C{copy:03d}-{r['id']}", s, r["relation"], o, text, r["source"]])
    args.out.parent.mkdir(parents=True, exist_ok=True)
    with open(args.out, "w", newline="", encoding="utf-8") as f:
        w = csv.writer(f, lineterminator="\n")
        w.writerow(["id", "subject", "relation", "object", "text", "source"])
        w.writerows(rows)
    print(f"wrote {len(rows)} facts ({len(base)} demo + {len(rows) - len(base)} filler "
          f"in {copy} renamed copies) to {args.out}")


if __name__ == "__main__":
    main()

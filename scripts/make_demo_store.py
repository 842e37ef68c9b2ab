#!/usr/bin/env python3
"""Generate the invented "supply" demo fact store and its multi-hop questions.

Everything here is fictitious: every person, company, product, place and
document name is assembled from syllables and codes by a seeded RNG.

Output (default ``factstores/supply``):
  facts.csv                  id,subject,relation,object,text,source
  questions_train.jsonl      seen wordings, training start entities
  questions_valid.jsonl      held-out start entities, half seen / half new wordings (not the test's)
  questions_test.jsonl       held-out start entities, half seen / half new wordings
  README.md                  description of the scenario and the files

Gold answers are computed with SQL joins (duckdb) over the facts.csv that was
just written, never by hand in Python.  Re-running with the same seed gives
byte-identical files.

Usage:  python scripts/make_demo_store.py [--seed N] [--out DIR]
"""
from __future__ import annotations

import argparse
import csv
import json
import random
from pathlib import Path

import duckdb

SEED = 20250611
DEFAULT_OUT = Path("factstores/supply")

# --------------------------------------------------------------------------
# Sizes
# --------------------------------------------------------------------------
N_COUNTRIES = 9
N_CITIES = 80
N_PORTS = 12
N_AUDITORS = 10
N_SUPPLIER_STEMS = 230          # some stems yield two look-alike suppliers
N_PERSONS = 360
N_LEADS = 36                    # persons that report to nobody
N_PARTS = 1300
N_ASSEMBLIES = 400
SPLIT_FRACTIONS = (0.60, 0.15, 0.25)       # train / valid / test start pools
SPLIT_SIZES = {"train": 1500, "valid": 300, "test": 600}

# --------------------------------------------------------------------------
# Relations: per-relation sentence template and source documents
# --------------------------------------------------------------------------
REL_TEXT = {
    "contains part": "Assembly {s} contains part {o}.",
    "made by": "Part {s} is made by {o}.",
    "repaired by": "Part {s} is repaired by {o}.",
    "based in": "{s} is based in {o}.",
    "ships from": "{s} ships from {o}.",
    "registered in": "{s} is registered in {o}.",
    "located in": "{s} is located in {o}.",
    "certified by": "{s} is certified by {o}.",
    "holds certificate": "{s} holds certificate {o}.",
    "issued by": "Certificate {s} was issued by {o}.",
    "managed by": "{s} is managed by {o}.",
    "reports to": "{s} reports to {o}.",
    "works in": "{s} works in {o}.",
    "ships through": "{s} ships through {o}.",
}
REL_SOURCES = {
    "contains part": ["bom-export-2025.csv line {n}", "assembly-drawings-v3.pdf p. {p}"],
    "made by": ["parts-register.xlsx row {n}", "purchase-orders-2024.csv line {n}"],
    "repaired by": ["service-contracts.xlsx row {n}", "maintenance-log-2025 entry {n}"],
    "based in": ["supplier-master.xlsx row {n}", "vendor-onboarding-forms.pdf p. {p}"],
    "ships from": ["logistics-plan-2025.xlsx row {n}", "dispatch-notes-2024 entry {n}"],
    "registered in": ["trade-registry-extract.pdf p. {p}", "supplier-master.xlsx row {n}"],
    "located in": ["geo-reference.csv row {n}"],
    "certified by": ["audit-log-2025 entry {n}", "compliance-summary-q1.pdf p. {p}"],
    "holds certificate": ["cert-registry.xlsx row {n}", "audit-log-2025 entry {n}"],
    "issued by": ["cert-registry.xlsx row {n}"],
    "managed by": ["account-owners.xlsx row {n}", "org-chart-2025.pdf p. {p}"],
    "reports to": ["org-chart-2025.pdf p. {p}", "hr-directory-export.csv line {n}"],
    "works in": ["hr-directory-export.csv line {n}", "badge-office-list.xlsx row {n}"],
    "ships through": ["logistics-plan-2025.xlsx row {n}", "freight-bookings-2024.csv line {n}"],
}

# --------------------------------------------------------------------------
# Question chains: (start type, relations, seen templates, new templates for the test split,
# new templates for the valid split).  Template index = position in seen + new + valid-new;
# "seen" ones appear in every split, the test's new ones only in test, the valid split's new
# ones only in valid (so settings and early stopping can be judged on wordings never
# trained on without looking at the test's).
# --------------------------------------------------------------------------
CHAINS = [
    ("part", ["made by"],
     ["Who makes part {e}?",
      "Which supplier makes part {e}?",
      "Part {e} is made by which company?",
      "Which company builds part {e}?",
      "Who is the maker of part {e}?",
      "Tell me the vendor that makes part {e}."],
     ["Name the manufacturer responsible for producing component {e}.",
      "What firm fabricates the item coded {e}?"],
     ["Whose plant turns out part {e}?",
      "Which enterprise produces the part labelled {e}?"]),
    ("supplier", ["based in"],
     ["In which city is {e} based?",
      "Where is {e} based?",
      "Which city is {e} based in?",
      "Where is {e} located?",
      "Which city does {e} operate from?",
      "Tell me the city where {e} is situated."],
     ["What town hosts the headquarters of {e}?",
      "{e} keeps its head office in what municipality?"],
     ["From what urban centre does {e} run its business?",
      "Where does {e} have its main seat?"]),
    ("supplier", ["certified by"],
     ["Who certified {e}?",
      "Which auditor certified {e}?",
      "{e} is certified by which body?",
      "Which certifier approved {e}?",
      "Who audits {e} for its certificate?",
      "Tell me the certifying body of {e}."],
     ["Which assessment organisation vouches for the quality system of {e}?",
      "Name the inspection body that accredits {e}."],
     ["Which agency has granted {e} its certification?",
      "Whose seal of approval does {e} carry?"]),
    ("person", ["reports to"],
     ["Who does {e} report to?",
      "To whom does {e} report?",
      "Which manager does {e} report to?",
      "Who is the manager of {e}?",
      "Who does {e} answer to?",
      "Tell me the superior of {e}."],
     ["Name the direct supervisor of {e}.",
      "Who is the line boss of {e}?"],
     ["Whom does {e} take orders from?",
      "Who sits above {e} in the hierarchy?"]),
    ("part", ["made by", "based in"],
     ["In which city is the maker of part {e} based?",
      "Where is the company that makes part {e} based?",
      "Which city is the maker of part {e} based in?",
      "Where is the maker of part {e} located?",
      "Which city does the company building part {e} operate from?",
      "Tell me the city where the vendor of part {e} is situated."],
     ["The manufacturer of component {e} has its headquarters in what town?",
      "Name the home city of the firm that produces item {e}."],
     ["Where does the enterprise producing part {e} have its main seat?",
      "From what urban centre does the producer of part {e} run its business?"]),
    ("part", ["made by", "certified by"],
     ["Who certified the maker of part {e}?",
      "Which auditor certified the company that makes part {e}?",
      "The maker of part {e} is certified by which body?",
      "Which certifier approved the maker of part {e}?",
      "Who audits the company that builds part {e}?",
      "Tell me the certifying body of the vendor of part {e}."],
     ["Which assessment organisation accredits the manufacturer of component {e}?",
      "Name the inspection body vouching for whoever fabricates item {e}."],
     ["Which agency granted certification to the producer of part {e}?",
      "Whose seal of approval does the enterprise behind part {e} carry?"]),
    ("supplier", ["based in", "located in"],
     ["In which country is {e} based?",
      "Which country is the city where {e} is based located in?",
      "{e} is based in a city located in which country?",
      "Which country does {e} operate from?",
      "In what country is {e} situated?",
      "Tell me the country where {e} is located."],
     ["What nation hosts the headquarters of {e}?",
      "Name the nation where {e} keeps its head office."],
     ["In what jurisdiction does {e} have its main seat?",
      "Which land is home to {e}?"]),
    ("assembly", ["contains part", "made by"],
     ["Who makes the parts in assembly {e}?",
      "Which suppliers make the parts contained in assembly {e}?",
      "Assembly {e} contains parts made by which companies?",
      "Which companies build the parts of assembly {e}?",
      "Who are the makers of the parts that assembly {e} contains?",
      "Tell me the vendors of the parts in assembly {e}."],
     ["Which manufacturers produce the components that go into unit {e}?",
      "Name the firms fabricating the pieces of module {e}."],
     ["Which enterprises produce what assembly {e} is built from?",
      "Whose plants turn out the parts of assembly {e}?"]),
    ("part", ["made by", "based in", "located in"],
     ["In which country is the maker of part {e} based?",
      "Which country is the city where the maker of part {e} is based located in?",
      "The company that makes part {e} is based in a city in which country?",
      "Which country does the maker of part {e} operate from?",
      "In what country is the company building part {e} situated?",
      "Tell me the country where the vendor of part {e} is located."],
     ["What nation hosts the headquarters of the manufacturer of component {e}?",
      "Name the nation in which the firm fabricating item {e} keeps its head office."],
     ["In what jurisdiction does the producer of part {e} have its main seat?",
      "Which land is home to the enterprise producing part {e}?"]),
    ("assembly", ["contains part", "made by", "based in"],
     ["In which cities are the makers of the parts in assembly {e} based?",
      "Where are the suppliers that make the parts of assembly {e} based?",
      "Assembly {e} contains parts made by companies based in which cities?",
      "Which cities do the makers of the parts in assembly {e} operate from?",
      "Where are the companies that build the parts of assembly {e} located?",
      "Tell me the cities where the vendors of the parts in assembly {e} are situated."],
     ["In what towns are the manufacturers of the components of unit {e} headquartered?",
      "Name the home cities of the firms that fabricate pieces going into module {e}."],
     ["Where do the producers of the parts of assembly {e} have their main seats?",
      "From what urban centres do the enterprises behind the parts of assembly {e} run their business?"]),
    ("part", ["made by", "managed by", "reports to"],
     ["Who does the manager of the maker of part {e} report to?",
      "The company that makes part {e} is managed by someone who reports to whom?",
      "To whom does the manager of the maker of part {e} report?",
      "Who is the superior of the manager of the maker of part {e}?",
      "Who does the person managing the company that builds part {e} answer to?",
      "Tell me the superior of the manager of the vendor of part {e}."],
     ["Name the direct supervisor of the account handler for the manufacturer of component {e}.",
      "Who is the line boss of the contact overseeing the firm that fabricates item {e}?"],
     ["Whom does the relationship owner for the producer of part {e} take orders from?",
      "Who sits above the person looking after the enterprise behind part {e}?"]),
    ("supplier", ["managed by", "works in", "located in"],
     ["In which country does the manager of {e} work?",
      "The person who manages {e} works in a city in which country?",
      "Which country is the city where the manager of {e} works located in?",
      "Which country does the manager of {e} work in?",
      "In what country is the city where the manager of {e} works?",
      "Tell me the country where the person managing {e} works."],
     ["What nation is the account handler for {e} employed in?",
      "Name the nation where the contact overseeing {e} has an office."],
     ["In what jurisdiction does the relationship owner for {e} have their desk?",
      "Which land is home to the workplace of the person looking after {e}?"]),
]

# --------------------------------------------------------------------------
# Name generation (pure syllables; nothing real)
# --------------------------------------------------------------------------
ONSETS = ["b", "d", "f", "g", "k", "l", "m", "n", "p", "r", "s", "t", "v", "z",
          "b", "d", "k", "l", "m", "r", "s", "t", "v", "br", "dr", "kr", "tr", "th", "gr"]
VOWELS = ["a", "e", "i", "o", "u", "a", "e", "o"]
INNER_CODAS = ["", "", "", "", "n", "l", "r", "s"]
FINAL_CODAS = ["", "n", "l", "r", "s", "th", "x", "nd", "rn", "k"]
COUNTRY_ENDS = ["ovia", "arra", "esk", "undria", "alia", "eth", "ostan", "ira"]
CITY_ENDS = ["vek", "mara", "esk", "oth", "ilde", "usk", "arn", "ova", "enz", "ith"]
SUPPLIER_SUFFIX_PAIRS = [("Components", "Composites"), ("Metals", "Metalworks"),
                         ("Fabrication", "Fabricators"), ("Castings", "Coatings"),
                         ("Polymers", "Plastics"), ("Electronics", "Electrics"),
                         ("Tooling", "Tools"), ("Forge", "Foundry"),
                         ("Hydraulics", "Pneumatics"), ("Alloys", "Assemblies")]
AUDITOR_SUFFIXES = ["Assurance Bureau", "Certification Board", "Audit Services",
                    "Quality Institute", "Standards Office"]
PORT_FORMS = ["Port {}", "{} Harbour", "{} Docks", "{} Freight Terminal"]
ASSEMBLY_NOUNS = ["Pump Unit", "Drive Module", "Valve Block", "Sensor Array",
                  "Gear Train", "Control Cabinet", "Cooling Loop", "Hydraulic Rack",
                  "Motor Frame", "Filter Stack", "Brake Housing", "Feeder Arm"]
PART_PREFIXES = ["KX", "VZ", "QM", "RD", "ZN", "BX", "HV", "WK", "JT", "FX", "TQ", "XL"]
# Syllable output that happens to spell a common real name is rejected.
BLOCKLIST = {"berlin", "milan", "paris", "rome", "london", "dubai", "oslo", "lima",
             "tokyo", "delhi", "kiev", "riga", "sofia", "malta", "nike", "sony",
             "tesla", "ford", "bosch", "siemens", "maria", "anna", "peter", "john",
             "boston", "denver", "dallas", "austin", "toledo", "verona", "genoa"}


class Names:
    """Unique-name registry shared by every entity type."""

    def __init__(self, rng: random.Random):
        self.rng = rng
        self.used: set[str] = set()
        self.stems: set[str] = set()

    def syllable(self, final: bool) -> str:
        r = self.rng
        return r.choice(ONSETS) + r.choice(VOWELS) + r.choice(FINAL_CODAS if final
                                                               else INNER_CODAS)

    def stem(self, n_syl=(2, 2, 3), end: str = "") -> str:
        while True:
            k = self.rng.choice(n_syl)
            s = "".join(self.syllable(i == k - 1 and not end) for i in range(k)) + end
            s = s.capitalize()
            if 4 <= len(s) <= 11 and s.lower() not in BLOCKLIST and s not in self.stems:
                self.stems.add(s)
                return s

    def variant(self, s: str) -> str:
        """A look-alike of stem s (one vowel changed or last letter doubled)."""
        for _ in range(50):
            idx = [i for i, c in enumerate(s) if c in "aeiou" and i > 0]
            swap_end = s[-2] in "aeiou" and s[-1] not in "aeiou"
            if idx and (self.rng.random() < 0.7 or not swap_end):
                i = self.rng.choice(idx)
                v = self.rng.choice([c for c in "aeiou" if c != s[i]])
                t = s[:i] + v + s[i + 1:]
            else:       # swap the final consonant (never append: keeps names non-nested)
                t = s[:-1] + self.rng.choice([c for c in "lnrstk" if c != s[-1]])
            if t not in self.stems and t.lower() not in BLOCKLIST:
                self.stems.add(t)
                return t
        return self.stem()

    def register(self, name: str) -> str:
        assert name not in self.used, f"duplicate entity name {name!r}"
        self.used.add(name)
        return name


# --------------------------------------------------------------------------
# World generation
# --------------------------------------------------------------------------
def build_world(rng: random.Random):
    names = Names(rng)
    facts: list[tuple[str, str, str]] = []

    def add(s, r, o):
        facts.append((s, r, o))

    def weighted(items, hub_weight):
        """Pick from items; items[0] is a hub drawn with probability hub_weight."""
        if rng.random() < hub_weight:
            return items[0]
        return rng.choice(items[1:])

    # countries (index 0 is the hub country)
    countries = [names.register(names.stem((1, 2), rng.choice(COUNTRY_ENDS)))
                 for _ in range(N_COUNTRIES)]
    # cities, some in look-alike pairs; index 0 is the hub city
    cities: list[str] = []
    while len(cities) < N_CITIES:
        s = names.stem((1, 2), rng.choice(CITY_ENDS))
        cities.append(names.register(s))
        if len(cities) < N_CITIES and rng.random() < 0.25:
            cities.append(names.register(names.variant(s)))
    for c in cities:
        add(c, "located in", weighted(countries, 0.40))

    ports = [names.register(rng.choice(PORT_FORMS).format(names.stem((2,))))
             for _ in range(N_PORTS)]
    for p in ports:
        add(p, "located in", rng.choice(cities))

    auditor_stems = [names.stem((2, 3)) for _ in range(N_AUDITORS)]
    auditors = [names.register(f"{s} {rng.choice(AUDITOR_SUFFIXES)}") for s in auditor_stems]
    for a in auditors:
        add(a, "based in", weighted(cities, 0.3))

    # persons: leads first, then staff; near-duplicate surnames
    given = [names.stem((2,)) for _ in range(70)]
    surnames: list[str] = []
    while len(surnames) < 150:
        s = names.stem((2, 3))
        surnames.append(s)
        if rng.random() < 0.4:
            surnames.append(names.variant(s))
    persons: list[str] = []
    while len(persons) < N_PERSONS:
        n = f"{rng.choice(given)} {rng.choice(surnames)}"
        if n not in names.used:
            persons.append(names.register(n))
    leads, staff = persons[:N_LEADS], persons[N_LEADS:]
    for i, p in enumerate(persons):
        add(p, "works in", weighted(cities, 0.25))
    mids: list[str] = []
    for p in staff:
        if mids and rng.random() < 0.3:
            boss = rng.choice(mids)
        else:
            boss = weighted(leads, 0.15)   # leads[0] is a hub manager
            mids.append(p)
        add(p, "reports to", boss)
        if rng.random() < 0.04:            # dotted-line second manager
            other = rng.choice(leads)
            if other != boss:
                add(p, "reports to", other)

    # suppliers: ~40% of stems produce a look-alike pair
    suppliers: list[str] = []
    twin: dict[str, str] = {}
    for _ in range(N_SUPPLIER_STEMS):
        st = names.stem((2, 3))
        a, b = rng.choice(SUPPLIER_SUFFIX_PAIRS)
        if rng.random() < 0.5:
            a, b = b, a
        s1 = names.register(f"{st} {a}")
        suppliers.append(s1)
        r = rng.random()
        if r < 0.30:
            s2 = names.register(f"{st} {b}")
        elif r < 0.45:
            s2 = names.register(f"{names.variant(st)} {a}")
        else:
            continue
        suppliers.append(s2)
        twin[s1], twin[s2] = s2, s1

    account_managers = rng.sample(staff, 110)
    cert_no = rng.sample(range(10000, 99999), 800)
    certificates: list[str] = []
    for s in suppliers:
        home = weighted(cities, 0.12)
        add(s, "based in", home)
        if rng.random() < 0.75:             # usually ships from somewhere else
            add(s, "ships from", weighted([c for c in cities if c != home], 0.15)
                if home != cities[0] else rng.choice(cities[1:]))
        else:
            add(s, "ships from", home)
        add(s, "registered in", weighted(countries, 0.5))
        aud = weighted(auditors, 0.35)
        add(s, "certified by", aud)
        if rng.random() < 0.08:
            other = rng.choice(auditors)
            if other != aud:
                add(s, "certified by", other)
        add(s, "managed by", rng.choice(account_managers))
        add(s, "ships through", weighted(ports, 0.40))
        if rng.random() < 0.15:
            add(s, "ships through", rng.choice(ports[1:]))
        for _ in range(rng.choice((1, 1, 2))):
            c = names.register(f"CERT-{cert_no[len(certificates)]}")
            certificates.append(c)
            add(s, "holds certificate", c)
            # the issuing auditor is often NOT the certifying one (trap)
            add(c, "issued by", aud if rng.random() < 0.3 else weighted(auditors, 0.35))

    # parts: families of codes differing in one digit, makers often twins
    parts: list[str] = []
    while len(parts) < N_PARTS:
        prefix = rng.choice(PART_PREFIXES)
        base = f"{rng.randint(100, 999)}"
        digits = rng.sample(range(10), rng.choice((1, 2, 2, 3, 4)))
        fam_maker = rng.choice(suppliers)
        for d in digits:
            code = f"{prefix}-{base}{d}"
            if code in names.used or len(parts) >= N_PARTS:
                continue
            parts.append(names.register(code))
            if fam_maker in twin and rng.random() < 0.5:
                maker = twin[fam_maker]
            elif rng.random() < 0.5:
                maker = fam_maker
            else:
                maker = rng.choice(suppliers)
            add(code, "made by", maker)
            if rng.random() < 0.10:             # dual-sourced part
                second = rng.choice(suppliers)
                if second != maker:
                    add(code, "made by", second)
            if rng.random() < 0.55:             # repairer: look-alike of maker (trap)
                rep = twin.get(maker) if rng.random() < 0.5 else None
                add(code, "repaired by", rep or rng.choice(suppliers))

    # assemblies
    assemblies: list[str] = []
    asm_stems = [names.stem((2,)) for _ in range(160)]
    while len(assemblies) < N_ASSEMBLIES:
        n = f"{rng.choice(asm_stems)} {rng.choice(ASSEMBLY_NOUNS)}"
        if n not in names.used:
            assemblies.append(names.register(n))
    for a in assemblies:
        for p in rng.sample(parts, rng.choice((2, 2, 3, 3, 4))):
            add(a, "contains part", p)

    entities = {"country": countries, "city": cities, "port": ports, "auditor": auditors,
                "person": persons, "supplier": suppliers, "certificate": certificates,
                "part": parts, "assembly": assemblies}
    # a start entity whose name sits inside another name (e.g. "Ana Vel" in
    # "Ana Velt") could leak through the text of another question: not a start
    every_name = "\n" + "\n".join(n for v in entities.values() for n in v) + "\n"
    starts = {typ: [e for e in ents if every_name.count(e) == 1]
              for typ, ents in (("part", parts), ("supplier", suppliers),
                                ("person", staff), ("assembly", assemblies))}
    return facts, entities, starts


def write_facts(facts, rng: random.Random, path: Path) -> None:
    facts = list(dict.fromkeys(facts))          # drop exact duplicates, keep order
    rng.shuffle(facts)
    counters: dict[str, int] = {}
    rows = []
    for i, (s, r, o) in enumerate(facts):
        tmpl = rng.choice(REL_SOURCES[r])
        doc = tmpl.split(" ")[0]
        counters[doc] = counters.get(doc, 1) + rng.randint(1, 4)
        n = counters[doc]
        source = tmpl.format(n=n + 1, p=n // 40 + 1)
        rows.append((f"F{i + 1:06d}", s, r, o, REL_TEXT[r].format(s=s, o=o), source))
    with open(path, "w", newline="", encoding="utf-8") as f:
        w = csv.writer(f, lineterminator="\n")
        w.writerow(["id", "subject", "relation", "object", "text", "source"])
        w.writerows(rows)


def chain_answers(con, rels: list[str]) -> dict[str, list[str]]:
    """All entities reachable from every possible start along rels (SQL join)."""
    joins = []
    for i, _ in enumerate(rels[1:], start=2):
        joins.append(f"JOIN facts f{i} ON f{i}.subject = f{i - 1}.object "
                     f"AND f{i}.relation = ?")
    n = len(rels)
    sql = (f"SELECT DISTINCT f1.subject AS start, f{n}.object AS answer FROM facts f1 "
           + " ".join(joins)
           + " WHERE f1.relation = ? ORDER BY start, answer")
    params = list(rels[1:]) + [rels[0]]
    out: dict[str, list[str]] = {}
    for start, ans in con.execute(sql, params).fetchall():
        out.setdefault(start, []).append(ans)
    return out


def make_questions(con, starts, rng: random.Random):
    # partition start entities of every type into train / valid / test pools
    pool: dict[str, str] = {}
    for typ in sorted(starts):
        ents = sorted(starts[typ])
        rng.shuffle(ents)
        n_tr = round(len(ents) * SPLIT_FRACTIONS[0])
        n_va = round(len(ents) * SPLIT_FRACTIONS[1])
        for i, e in enumerate(ents):
            pool[e] = "train" if i < n_tr else "valid" if i < n_tr + n_va else "test"

    splits: dict[str, list[dict]] = {k: [] for k in SPLIT_SIZES}
    n_chains = len(CHAINS)
    for ci, (typ, rels, seen, new, valid_new) in enumerate(CHAINS):
        answers = chain_answers(con, rels)
        for split, total in SPLIT_SIZES.items():
            want = total // n_chains + (1 if ci < total % n_chains else 0)
            cands = [e for e in sorted(starts[typ])
                     if pool[e] == split and 1 <= len(answers.get(e, [])) <= 3]
            rng.shuffle(cands)
            if len(cands) < want:
                raise SystemExit(f"not enough {split} starts for chain {rels}: "
                                 f"{len(cands)} < {want}")
            for k, e in enumerate(cands[:want]):
                if split == "test" and k % 2 == 1:
                    t = len(seen) + rng.randrange(len(new))
                    wording = "new"
                else:
                    t = rng.randrange(len(seen))
                    wording = "seen"
                    if split == "valid" and k % 2 == 1:  # (the draw above keeps the other
                        #                                   splits as they were before)
                        t = len(seen) + len(new) + (k // 2) % len(valid_new)
                        wording = "new"
                text = (seen + new + valid_new)[t].format(e=e)
                text = text[0].upper() + text[1:]
                splits[split].append({
                    "question": text, "answer": answers[e], "hops": len(rels),
                    "chain": ">".join(rels), "start": e, "wording": wording,
                    "template": t})
    for qs in splits.values():
        rng.shuffle(qs)

    # held-out check: no valid/test start entity appears in any training question
    train_text = "\n".join(q["question"] for q in splits["train"])
    for split in ("valid", "test"):
        for q in splits[split]:
            assert q["start"] not in train_text, q
    return splits


README = """# `supply` demo fact store (invented)

A fictitious supply-chain / compliance register of a manufacturer. **Everything
is invented**: people, companies, assemblies, part codes, certificates, ports,
cities and countries are built from random syllables and codes by
`scripts/make_demo_store.py`. Any resemblance to real names is accidental.

## Entities
{entity_table}

## Relations ({n_rel})
| relation | subject -> object | facts |
|---|---|---|
{rel_table}

## Files
- `facts.csv` ({n_facts} facts) - columns `id,subject,relation,object,text,source`;
  `text` is a sentence from a per-relation template, `source` an invented document reference.
- `questions_{{train,valid,test}}.jsonl` ({sizes}) - one JSON object per line:
  `question`, `answer` (list of all entities reachable along the chain, 1-3 items),
  `hops`, `chain` (relations joined by `>`), `start` (the only entity the question
  names), `wording` (`seen`/`new`), `template` (index within the chain's templates).

## Question chains
{chain_table}

Start entities (parts, suppliers, staff, assemblies) are partitioned 60/15/25
into train/valid/test pools, so no valid/test start entity is named by any
training question. Each chain has two "new" wordings (different vocabulary
and structure) that occur only in the test split, where they make up half of the
questions, and two more that occur only in the valid split (half of it), so
early stopping and settings are judged on wordings never trained on without
looking at the test's. Gold answers come from SQL joins (duckdb)
over `facts.csv`.

## Built-in traps for greedy similarity retrieval
- Bridge entities are never named: a 2-/3-hop question names only its start.
- Look-alike names: supplier twins (`X Components` / `X Composites`, stems
  differing by one letter), near-identical city and surname pairs, part-code
  families differing in one digit (often made by twin suppliers).
- Look-alike relations: `made by` vs `repaired by` (both to suppliers),
  `based in` vs `ships from` (both to cities), `based in > located in` vs
  `registered in` (both end in countries), `certified by` vs
  `holds certificate > issued by` (both end in auditors), supplier `based in`
  vs manager `works in`.
- Hubs: one country, one city, one port, one auditor and one lead manager are
  linked to far more facts than the rest.

## Regenerate
```
python scripts/make_demo_store.py            # --seed {seed} --out factstores/supply
```
Re-running with the same seed reproduces every file byte for byte.
"""

REL_TYPES = {
    "contains part": "assembly -> part", "made by": "part -> supplier",
    "repaired by": "part -> supplier", "based in": "supplier, auditor -> city",
    "ships from": "supplier -> city", "registered in": "supplier -> country",
    "located in": "city -> country, port -> city", "certified by": "supplier -> auditor",
    "holds certificate": "supplier -> certificate", "issued by": "certificate -> auditor",
    "managed by": "supplier -> person", "reports to": "person -> person",
    "works in": "person -> city", "ships through": "supplier -> port",
}


def write_readme(path: Path, con, entities, splits, seed: int) -> None:
    rel_counts = dict(con.execute(
        "SELECT relation, count(*) FROM facts GROUP BY relation ORDER BY relation").fetchall())
    n_facts = sum(rel_counts.values())
    ent_table = "\n".join(f"- {k}: {len(v)}" for k, v in entities.items())
    ent_table += f"\n- total: {sum(len(v) for v in entities.values())} unique names"
    rel_table = "\n".join(f"| `{r}` | {REL_TYPES[r]} | {c} |" for r, c in rel_counts.items())
    chain_lines = ["| hops | chain | start | example (seen) | example (new) |", "|---|---|---|---|---|"]
    for typ, rels, seen, new, _ in CHAINS:
        chain_lines.append(f"| {len(rels)} | `{'>'.join(rels)}` | {typ} | "
                           f"{seen[0].format(e='X')} | {new[0].format(e='X')} |")
    sizes = ", ".join(f"{k} {len(v)}" for k, v in splits.items())
    path.write_text(README.format(entity_table=ent_table, n_rel=len(rel_counts),
                                  rel_table=rel_table, n_facts=n_facts, sizes=sizes,
                                  chain_table="\n".join(chain_lines), seed=seed),
                    encoding="utf-8")


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--seed", type=int, default=SEED)
    ap.add_argument("--out", type=Path, default=DEFAULT_OUT)
    args = ap.parse_args(argv)
    rng = random.Random(args.seed)
    args.out.mkdir(parents=True, exist_ok=True)

    facts, entities, starts = build_world(rng)
    facts_path = args.out / "facts.csv"
    write_facts(facts, rng, facts_path)

    con = duckdb.connect()
    con.execute("CREATE TABLE facts AS SELECT * FROM read_csv(?, header=true, "
                "all_varchar=true)", [str(facts_path)])
    splits = make_questions(con, starts, rng)
    for split, qs in splits.items():
        with open(args.out / f"questions_{split}.jsonl", "w", encoding="utf-8",
                  newline="\n") as f:
            for q in qs:
                f.write(json.dumps(q, ensure_ascii=False) + "\n")
    write_readme(args.out / "README.md", con, entities, splits, args.seed)
    n = con.execute("SELECT count(*) FROM facts").fetchone()[0]
    print(f"wrote {n} facts, " + ", ".join(f"{k} {len(v)}" for k, v in splits.items())
          + f" questions to {args.out}")


if __name__ == "__main__":
    main()

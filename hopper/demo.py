"""The demo: build the demo store from factstores/, train, answer, compare with greedy, audit one run."""
from __future__ import annotations

import json
import sys
from pathlib import Path

from .errors import InputError

DEMO_DIR = Path(__file__).resolve().parent.parent / "factstores" / "supply"


def _say(text=""):
    print(text, flush=True)


def run_demo(store_path: str, quick: bool = False, retrain: bool = False) -> None:
    from .api import Hopper
    from .audit import format_eval, format_run

    if not (DEMO_DIR / "facts.csv").exists():
        raise InputError("demo data not found", file=str(DEMO_DIR),
                         hint="run from a hopper checkout, or 'python scripts/make_demo_store.py'")
    hp = Hopper(store_path)
    _say(f"== 1. load the demo facts into {store_path}")
    rep = hp.load([DEMO_DIR / "facts.csv"])
    _say(f"   {rep['facts_added']} new facts, {rep['duplicates']} already stored")
    info = hp.info()
    pol = info["policy"]
    if pol is None or retrain or pol["settings"].get("facts_version") is None:
        _say("== 2. train the fetch policy (REINFORCE) on the training questions")
        extra = {"epochs": 3} if quick else {}
        summary = hp.train(DEMO_DIR / "questions_train.jsonl", valid=DEMO_DIR / "questions_valid.jsonl",
                           seed=0, log=lambda m: _say("   " + m), **extra)
        _say(f"   policy v{summary['version']}: validation Hits@1 {summary['valid_hits1']:.3f} "
             f"after {summary['epochs']} epochs, {summary['seconds']} s")
        if summary.get("curve_png"):
            _say(f"   training curve: {summary['curve_png']}")
    else:
        _say(f"== 2. policy v{pol['version']} is already trained (validation Hits@1 "
             f"{pol['scores'].get('valid_hits1', 0):.3f}); skipping training")
    test = [json.loads(l) for l in (DEMO_DIR / "questions_test.jsonl").read_text("utf-8").splitlines() if l]
    picks = []
    for hops in (1, 2, 3):
        for q in test:
            if q["hops"] == hops and q.get("wording") == "new":
                picks.append(q)
                break
    _say("== 3. answer held-out questions (entities and wordings never seen in training)")
    first = None
    for q in picks:
        pdoc = hp.ask(q["question"])
        gdoc = hp.ask(q["question"], strategy="greedy")
        first = first or pdoc
        ok = lambda d: "right" if d["answer"] in q["answer"] else "wrong"  # noqa: E731
        _say(f"   Q ({q['hops']} hop): {q['question']}")
        _say(f"      gold answer: {', '.join(q['answer'])}")
        _say(f"      policy: {pdoc['answer']} ({ok(pdoc)}, confidence {pdoc['confidence']:.2f})")
        for f in pdoc["fetches"]:
            _say(f"         hop {f['hop']}: {f['text']}  (p={f['probability']:.2f})")
        _say(f"      greedy similarity: {gdoc['answer']} ({ok(gdoc)})")
    _say("== 4. policy against the untrained baselines on the whole test split")
    _say(format_eval(hp.evaluate(DEMO_DIR / "questions_test.jsonl")))
    if first is not None:
        _say(f"== 5. audit of run {first['run_id']}")
        _say(format_run(hp.audit(first["run_id"])))
    _say("\nAnswers are only as good as the loaded facts and the trained policy: check the facts "
         "behind an answer before relying on it.")
    sys.stdout.flush()

"""Completion benchmark (UMLS, Kinship): train a policy, report filtered Hits@1/3/10 and MRR.

The data sets (Kok & Domingos 2007, with the train/valid/test splits of the published
results) are read from inside the pykeen wheel on PyPI, fetched with ``pip download`` into a
cache; pykeen is never installed or run, and the data stay in the cache (never committed).

Only TRAIN triples become facts.  Test queries go both ways: tail queries (s, r, ?) start at s
and ask r; head queries (?, r, o) start at o and ask the inverse relation ``r_inverse``.  The
walk already follows every fact both ways, so no inverse facts are needed for walking; the
policy only needs a *name* (a row of its learned relation vectors) for the inverse asked
relation.  ``--inverse anchor`` (default) registers those names with one self-loop fact per
inverse relation on a separate anchor entity that touches nothing else (and is left out of
every ranking); ``--inverse facts`` adds an inverse twin (o, r_inverse, s) for every train
triple instead (this doubles every entity's degree).

Two things are patched in for the run (see each function):
``hide_both_ways``: with inverse relation names a fact states an answer read either way
(hopper.env.answer_facts knows only the forward one): in training the fact of the hidden
answer must be hidden in both directions, or the walk reads the answer off its reverse, and in
training and test the walk must see which answers visible facts already state (env.Episode.stated).
``filtered_validation``: early stopping on filtered Hits@1 / MRR (train + valid answers
filtered), as the test metric is; ``--core-validation`` turns it off.
"""
from __future__ import annotations

import argparse
import bz2
import contextlib
import csv
import gzip
import lzma
import os
import platform
import subprocess
import sys
import time
import zipfile
from collections import Counter, defaultdict
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from hopper.metrics import filtered_rank, known_answers, ranking_metrics  # noqa: E402

PYKEEN = "pykeen==1.11.1"
CACHE = Path(os.environ.get("XDG_CACHE_HOME", Path.home() / ".cache")) / "hopper" / "datasets"
FOLDERS = {"umls": "umls", "kinship": "kinships"}   # data set -> its folder inside the wheel
INV = "_inverse"
ANCHOR = "hopper-inverse-relation-anchor"

# Published filtered test results, from memory (as issue 5 gives them): cite as such.
PUBLISHED = {
    "umls": [("MINERVA (Das et al., ICLR 2018), from memory", 0.728, None, 0.968, 0.825),
             ("Lin, Socher & Xiong (EMNLP 2018), from memory", 0.90, None, None, None)],
    "kinship": [("MINERVA (Das et al., ICLR 2018), from memory", 0.605, None, 0.924, 0.720),
                ("Lin, Socher & Xiong (EMNLP 2018), from memory", 0.80, None, None, None)],
}

# Training settings per data set (both graphs are dense: every entity touches ~80 (UMLS) or
# ~160 (Kinship) facts, so the cap on facts offered per hop is raised to the largest degree).
# Learned entity vectors and ComplEx reward shaping are on for both (hopper.train.TrainSettings:
# entity_embed, reward_scorer).  UMLS trains one episode per stated answer (the default,
# completion_episodes="one-answer": 0.297 -> 0.69-0.76 Hits@1); on Kinship that failed (valid
# Hits@1 0.02 after one epoch, the walk near uniform over ~160 facts a hop with one rewarded
# end among 104), so Kinship keeps every answer of a query hidden at once ("all-answers").
SETTINGS = {  # one member: the measured completion results are single policies (--set members=3
    #            trains an ensemble within the same budget, each member a share of it; not measured)
    "umls": dict(max_hops=2, adj_cap=320, batch_questions=16, lr=0.01, beam=32, patience=4,
                 entity_embed=True, reward_scorer="complex", members=1),
    "kinship": dict(max_hops=2, adj_cap=180, batch_questions=16, lr=0.01, beam=32, patience=4,
                    entity_embed=True, reward_scorer="complex", completion_episodes="all-answers",
                    members=1),
}


def _setting(text: str, current=None):
    """A ``--set`` value: typed like the current one, else bool, int, float or text."""
    if isinstance(current, bool) or text.lower() in ("true", "false"):
        return text.lower() in ("1", "true", "yes", "on")
    for kind in (int, float):
        try:
            return kind(text)
        except ValueError:
            pass
    return text


def log(msg: str) -> None:
    print(msg, file=sys.stderr, flush=True)


# -- data ----------------------------------------------------------------------------------------
def fetch_wheel(cache: Path = CACHE) -> Path:
    """The pykeen wheel in ``cache`` (downloaded once with pip, without its dependencies)."""
    cache.mkdir(parents=True, exist_ok=True)
    found = sorted(cache.glob("pykeen-1.11.1-*.whl"))
    if found:
        return found[0]
    subprocess.run([sys.executable, "-m", "pip", "download", "--no-deps", "--quiet",
                    "--disable-pip-version-check", PYKEEN, "-d", str(cache)], check=True)
    found = sorted(cache.glob("pykeen-1.11.1-*.whl"))
    if not found:
        raise RuntimeError(f"pip download {PYKEEN} left no wheel in {cache}")
    return found[0]


def _decompress(name: str, data: bytes) -> bytes:
    if name.endswith(".gz"):
        return gzip.decompress(data)
    if name.endswith(".bz2"):
        return bz2.decompress(data)
    if name.endswith((".xz", ".lzma")):
        return lzma.decompress(data)
    return data


def read_splits(wheel: Path, dataset: str) -> dict[str, list[tuple[str, str, str]]]:
    """{'train'|'valid'|'test': [(subject, relation, object)]} from the wheel's data files."""
    folder = FOLDERS[dataset]
    out = {}
    with zipfile.ZipFile(wheel) as z:
        names = z.namelist()
        for split in ("train", "valid", "test"):
            hits = [n for n in names if f"/datasets/{folder}/{split}." in n
                    and n.rsplit("/", 1)[-1].split(".")[1] in ("txt", "tsv")]
            if len(hits) != 1:
                raise RuntimeError(f"{wheel.name}: expected one {folder}/{split} file, "
                                   f"found {hits}")
            text = _decompress(hits[0], z.read(hits[0])).decode("utf-8")
            rows = []
            for line in text.splitlines():
                if line.strip():
                    s, r, o = line.split("\t")
                    rows.append((s.strip(), r.strip(), o.strip()))
            out[split] = rows
    return out


def inverse(r: str) -> str:
    return r[:-len(INV)] if r.endswith(INV) else r + INV


def write_facts(path: Path, train, mode: str) -> None:
    """The facts CSV: train triples, plus the inverse-relation names (see module doc)."""
    rels = sorted({r for _, r, _ in train})
    with open(path, "w", newline="", encoding="utf-8") as f:
        w = csv.writer(f)
        w.writerow(["subject", "relation", "object"])
        w.writerows(train)
        if mode == "facts":
            w.writerows((o, inverse(r), s) for s, r, o in train)
        else:
            w.writerows((ANCHOR, inverse(r), ANCHOR) for r in rels)


def queries(triples, both: bool = True) -> dict:
    """{(start, asked relation): {answers}}: tail queries, and head queries through inverses."""
    out = defaultdict(set)
    for s, r, o in triples:
        out[(s, r)].add(o)
        if both:
            out[(o, inverse(r))].add(s)
    return out


def question_dicts(qs: dict) -> list[dict]:
    return [{"subject": s, "relation": r, "answer": sorted(a)} for (s, r), a in sorted(qs.items())]


# -- answers stated both ways -------------------------------------------------------------------
@contextlib.contextmanager
def hide_both_ways():
    """The facts that state an answer of a completion question (subject, R) are (subject, R, x)
    read forward and (x, inverse(R), subject) read backwards; core ``answer_facts`` knows only
    the first.  hopper.env builds on it what training hides (the answer's facts, or with
    inverse names the walk reads the answer off the reverse of the hidden fact) and which
    answers a visible fact already states, so this is on for training and for the test."""
    from hopper import env

    def answer_facts(graph, subject, relation):
        names = graph.relation_names
        want = {(names.index(relation), 0)} if relation in names else set()
        if inverse(relation) in names:
            want.add((names.index(inverse(relation)), 1))
        facts, dirs = graph.neighbours(subject)
        return {int(f): graph.far_end(int(f), int(d)) for f, d in zip(facts, dirs)
                if (int(graph.rel[f]), int(d)) in want}

    with _patched([(env, "answer_facts", answer_facts)]):
        yield


@contextlib.contextmanager
def filtered_validation(known: dict):
    """Early-stop on *filtered* Hits@1 / MRR.  Core ``validate`` ranks the gold answers among
    all answers, so a walk that finds an answer already known from train counts as a miss."""
    from hopper import train as tr

    original_validate, original_hr = tr.validate, tr.hits_and_rank
    state: dict = {}

    def hits_and_rank(outcome, gold):
        if "true" not in state:
            return original_hr(outcome, gold)
        scores = dict(outcome.ranked)
        ranks = [filtered_rank(scores, g, state["true"], state["n"]) for g in gold]
        if not ranks:
            return 0.0, 0.0
        return sum(r <= 1 for r in ranks) / len(ranks), sum(1 / r for r in ranks) / len(ranks)

    def validate(graph, policy, eps, beam):
        names, rels = graph.entity_names, graph.relation_names
        hits, rr, conf = [], [], []
        for ep in eps:
            key = (names[ep.starts[0]], rels[ep.qrel]) if ep.starts and ep.qrel >= 0 else None
            state["true"] = {graph.entity_index(e) for e in known.get(key, ())} | set(ep.gold)
            state["n"] = len(names)
            h, r, c = original_validate(graph, policy, [ep], beam)
            hits.append(h)
            rr.append(r)
            conf += c
        state.clear()
        return (sum(hits) / len(hits) if hits else 0.0, sum(rr) / len(rr) if rr else 0.0, conf)

    with _patched([(tr, "validate", validate), (tr, "hits_and_rank", hits_and_rank)]):
        yield


@contextlib.contextmanager
def _patched(changes):
    saved = [(m, name, getattr(m, name)) for m, name, _ in changes]
    try:
        for m, name, value in changes:
            setattr(m, name, value)
        yield
    finally:
        for m, name, value in saved:
            setattr(m, name, value)


# -- evaluation ------------------------------------------------------------------------------------
def rank_queries(hp, test, known: dict, entities: list[str], prior: dict | None = None,
                 both: bool = True, beam: int | None = None, hide: dict | None = None,
                 scorer_weight: float | None = None) -> dict:
    """Filtered rank of every test triple's answer (each direction a query), from beam scores.

    Each distinct (start, relation) query is searched once; its scores rank each of its gold
    answers, with the other known answers (train + valid + test) filtered out.  Returns ranks
    for "policy" (beam scores only), for "backoff" (entities the beam did not reach ordered
    by ``prior``: {relation: {entity: count}}, after the reached ones), per direction, and how many gold
    answers the beam reached at all.

    With ``hide`` ({(start, relation): {answers known from train}}) the facts stating those
    known answers are hidden from the search, as they were in training (see search_hiding)."""
    qs = queries(test, both)
    keys = sorted(qs)
    with _policy_settings(beam=beam, scorer_weight=scorer_weight):
        docs = search_hiding(hp, keys, hide, beam) if hide is not None else hp.ask_many(
            [{"subject": s, "relation": r} for s, r in keys], top=min(1000, len(entities) + 1),
            record=False)
    ents = set(entities)
    out = {"policy": [], "backoff": [], "tail": [], "head": [], "reached": 0}
    for (s, r), doc in zip(keys, docs):
        scores = {d["answer"]: d["score"] for d in doc["ranked"] if d["answer"] in ents}
        p = (prior or {}).get(r, {})
        top = max(p.values(), default=0) + 1
        mixed = {e: scores[e] if e in scores else -1.0 + p.get(e, 0) / top for e in entities}
        for g in sorted(qs[(s, r)]):
            true = known.get((s, r), set())
            rk = filtered_rank(scores, g, true, len(entities))
            out["policy"].append(rk)
            out["head" if r.endswith(INV) else "tail"].append(rk)
            out["backoff"].append(filtered_rank(mixed, g, true, len(entities)))
            out["reached"] += g in scores
    return out


def search_hiding(hp, keys, hide: dict, beam: int | None = None) -> list[dict]:
    """Beam search (hopper.search) for each (start, relation) query with the facts that state
    its train-known answers hidden, both ways: the walk meets the graph as it did in training,
    where those facts were always hidden.  Uses only train facts, no test answers."""
    from hopper import env
    from hopper.questions import make_question
    from hopper.search import beam_search

    graph = hp._graph_now()
    policy = hp._policy()
    width = int(beam or policy.settings.get("beam", 16))
    qs = [make_question({"subject": s, "relation": r, "answer": sorted(hide.get((s, r), ())) or
                         ["(none)"]}) for s, r in keys]
    eps = env.episodes(graph, qs, hp._encode, hide_answers=True)
    names = graph.entity_names
    return [{"ranked": [{"answer": names[e], "score": float(sc)} for e, sc in
                        beam_search(graph, policy, ep, beam=width).ranked]} for ep in eps]


@contextlib.contextmanager
def _policy_settings(**changes):
    """Search with other settings than the policy was stored with (None: leave it)."""
    changes = {k: v for k, v in changes.items() if v is not None}
    if not changes:
        yield
        return
    from hopper.policy import Policy

    orig = Policy.read.__func__

    def read(cls, con, version=None, known=None):
        p = orig(cls, con, version)
        if p is not None:
            p.settings.update(changes)
        return p

    with _patched([(Policy, "read", classmethod(read))]):
        yield


def scorer_ranks(hp, train, test, known, entities, epochs: int, seed: int) -> list[float]:
    """Reference: filtered ranks from the one-hop ComplEx scorer alone (hopper.scorer), fitted
    as training fits it for reward shaping (same queries, epochs and seed).  It is not the
    walker; it shows what the shaping reward knows."""
    from hopper.scorer import fit_scorer

    graph = hp._graph_now()
    ent, rels = graph.entity_index, graph.relation_names
    fitted = fit_scorer([(ent(s), rels.index(r), {ent(a) for a in answers})
                         for (s, r), answers in sorted(queries(train).items())],
                        len(graph.entity_names), len(rels), epochs=epochs, seed=seed)
    names, inside = graph.entity_names, set(entities)
    ranks = []
    for (s, r), golds in sorted(queries(test).items()):
        logits = fitted.logits([ent(s)], [rels.index(r)])[0]
        scores = {names[i]: float(v) for i, v in enumerate(logits) if names[i] in inside}
        for g in sorted(golds):
            ranks.append(filtered_rank(scores, g, known.get((s, r), set()), len(entities)))
    return ranks


def relation_prior(train) -> dict:
    """{asked relation: Counter(entity -> how often it fills that slot in train)}."""
    freq = defaultdict(Counter)
    for s, r, o in train:
        freq[r][o] += 1
        freq[inverse(r)][s] += 1
    return freq


def frequency_ranks(train, test, known, entities, both: bool = True) -> list[float]:
    """Baseline: rank answers by how often they fill the asked relation (slot) in train."""
    freq = relation_prior(train)
    ranks = []
    for (s, r), golds in sorted(queries(test, both).items()):
        scores = dict(freq[r])
        for g in sorted(golds):
            ranks.append(filtered_rank(scores, g, known.get((s, r), set()), len(entities)))
    return ranks


def cpu_model() -> str:
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or "unknown"


def cores() -> int:
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:
        return os.cpu_count() or 1


def fmt(x) -> str:
    return "  -  " if x is None else f"{x:.3f}"


def _row(name, m) -> str:
    return (f"| {name:<48} | {fmt(m.get('hits1'))}  | {fmt(m.get('hits3'))}  | "
            f"{fmt(m.get('hits10'))}   | {fmt(m.get('mrr'))} |")


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--dataset", choices=sorted(FOLDERS), required=True)
    ap.add_argument("--minutes", type=float, default=20.0, help="training time budget")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--cache", type=Path, default=CACHE)
    ap.add_argument("--inverse", choices=("anchor", "facts"), default="anchor")
    ap.add_argument("--beam", type=int, default=None, help="beam width at test time")
    ap.add_argument("--set", action="append", default=[], metavar="KEY=VALUE",
                    help="override a training setting (hopper.train.TrainSettings)")
    ap.add_argument("--valid-queries", type=int, default=300,
                    help="validation queries used for early stopping (a sample)")
    ap.add_argument("--core-validation", action="store_true",
                    help="early-stop on core's unfiltered validation instead of filtered")
    ap.add_argument("--hide-known", action="store_true",
                    help="at test time hide the facts stating a query's train answers, as in "
                         "training (filtered metrics drop those answers anyway)")
    ap.add_argument("--eval-only", action="store_true",
                    help="evaluate the store's active policy without training")
    args = ap.parse_args(argv)
    argv_text = " ".join(sys.argv[1:] if argv is None else argv)

    import numpy as np

    import hopper

    t_start = time.monotonic()
    wheel = fetch_wheel(args.cache)
    splits = read_splits(wheel, args.dataset)
    train, valid, test = splits["train"], splits["valid"], splits["test"]
    entities = sorted({e for s, _, o in train + valid + test for e in (s, o)})
    log(f"{args.dataset}: {len(train)} train, {len(valid)} valid, {len(test)} test triples; "
        f"{len(entities)} entities, {len({r for _, r, _ in train})} relations")
    work = args.cache / args.dataset
    work.mkdir(parents=True, exist_ok=True)
    facts = work / f"facts-{args.inverse}.csv"
    write_facts(facts, train, args.inverse)
    store = work / f"{args.dataset}-{args.inverse}.duckdb"
    hp = hopper.open_store(store)
    t0 = time.monotonic()
    if not store.exists():
        hp.load([facts], progress=False)
    load_s = time.monotonic() - t0

    settings = dict(SETTINGS[args.dataset])
    for kv in args.set:
        k, v = kv.split("=", 1)
        settings[k] = _setting(v, settings.get(k))
    settings.setdefault("epochs", 1000)
    settings["time_budget"] = args.minutes * 60
    max_hops = int(settings.pop("max_hops"))
    known = known_answers(train + valid + test, inverse=inverse)
    summary, train_s = None, 0.0
    if not args.eval_only:
        rng = np.random.default_rng(args.seed)
        train_q = question_dicts(queries(train))
        valid_q = question_dicts(queries(valid))
        if args.valid_queries and len(valid_q) > args.valid_queries:
            pick = sorted(rng.choice(len(valid_q), args.valid_queries, replace=False))
            valid_q = [valid_q[i] for i in pick]
        log(f"training on {len(train_q)} queries ({len(valid_q)} for validation), "
            f"budget {args.minutes:g} min, settings {settings}")
        check = contextlib.nullcontext() if args.core_validation else \
            filtered_validation(known_answers(train + valid, inverse=inverse))
        t0 = time.monotonic()
        with hide_both_ways(), check:
            summary = hp.train(train_q, valid=valid_q, seed=args.seed, max_hops=max_hops,
                               progress=False, log=lambda m: log("  " + m), **settings)
        train_s = time.monotonic() - t0
    t0 = time.monotonic()
    prior = relation_prior(train)
    with hide_both_ways():
        hide = known_answers(train, inverse=inverse) if args.hide_known else None
        res = rank_queries(hp, test, known, entities, prior=prior, beam=args.beam, hide=hide)
        weight = float((hp._policy().settings or {}).get("scorer_weight", 0.0))
        alone = rank_queries(hp, test, known, entities, beam=args.beam, hide=hide,
                             scorer_weight=0.0) if weight > 0 else None
    eval_s = time.monotonic() - t0
    ours = ranking_metrics(res["policy"])
    base = ranking_metrics(frequency_ranks(train, test, known, entities))

    print(f"\n## {args.dataset}: filtered test metrics, both directions "
          f"({ours['n']} queries: {len(test)} test triples, tail and head)")
    print(f"| {'method':<48} | Hits@1 | Hits@3 | Hits@10 |  MRR  |")
    print(f"|{'-' * 50}|--------|--------|---------|-------|")
    print(_row("hopper policy, beam search (this run)" +
               (", known hidden" if args.hide_known else "") +
               (f", scorer weight {weight:g}" if weight > 0 else ""), ours))
    print(_row("  tail queries (s, r, ?) only", ranking_metrics(res["tail"])))
    print(_row("  head queries (?, r, o) only", ranking_metrics(res["head"])))
    print(_row("  + relation-frequency back-off (unreached)", ranking_metrics(res["backoff"])))
    if alone is not None:
        print(_row("  beam scores alone (scorer weight 0)", ranking_metrics(alone["policy"])))
    print(_row("relation-frequency baseline (this run)", base))
    if str(settings.get("reward_scorer", "none")).startswith("complex"):
        t1 = time.monotonic()
        from hopper.train import TrainSettings

        epochs = int(settings.get("scorer_epochs", TrainSettings.scorer_epochs))
        sc = ranking_metrics(scorer_ranks(hp, train, test, known, entities, epochs, args.seed))
        print(_row("one-hop ComplEx scorer alone (shaping reward)", sc))
        log(f"scorer reference row: {time.monotonic() - t1:.0f} s")
    for name, h1, h3, h10, mrr in PUBLISHED[args.dataset]:
        print(_row(name, {"hits1": h1, "hits3": h3, "hits10": h10, "mrr": mrr}))
    print(f"\nranks: filtered (other answers known from train+valid+test removed), ties at their "
          f"mean place; entities the beam did not reach share the places after the reached ones; "
          f"the beam reached {res['reached'] / max(ours['n'], 1):.1%} of the gold answers")
    if summary is not None:
        print(f"training: {train_s / 60:.1f} min ({summary['epochs']} epochs, "
              f"{summary['rollouts_per_second']} rollouts/s, budget {args.minutes:g} min, "
              f"checked after each epoch); validation Hits@1 {summary['valid_hits1']:.3f} "
              f"({'unfiltered' if args.core_validation else 'filtered'}, "
              f"{min(args.valid_queries, len(valid))} valid queries)")
    print(f"evaluation {eval_s / 60:.1f} min; load {load_s:.0f} s; total "
          f"{(time.monotonic() - t_start) / 60:.1f} min")
    pol = hp.info().get("policy") or {}
    beam = max(int(args.beam or settings.get("beam")), min(1000, len(entities) + 1))  # ask's
    #      beam is widened to the --top it is asked for (hopper.api.Hopper._beam): every entity
    print(f"settings: max_hops={max_hops} " + " ".join(
        f"{k}={v}" for k, v in settings.items() if k not in ("time_budget", "beam")) +
        f" beam={beam}; other training settings: hopper.train.TrainSettings defaults"
        f"{'; policy ' + str(pol.get('version')) if pol else ''}")
    print(f"machine: {cores()} cores, {cpu_model()}, load average "
          f"{' '.join(f'{x:.1f}' for x in os.getloadavg())} (at the end)")
    print(f"command: scripts/bench_completion {argv_text}")
    return 0


if __name__ == "__main__":
    sys.exit(main())

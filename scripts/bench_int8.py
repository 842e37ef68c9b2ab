#!/usr/bin/env python3
"""Would int8 dynamic quantisation of the encoder pay for loading? Speed, cosine, demo quality lost.

Quantises the cached ONNX export with onnxruntime.quantization.quantize_dynamic (weights
int8, per channel) and encodes the same fact texts with both models.  Then, in one run, it
re-embeds what a load embeds (fact texts, entity and relation names) with the int8 model and
compares, on the demo test split, the store's trained policy and the baselines with the
store's fp32 vectors and with int8 ones.  Questions are encoded by the fp32 model in both
(``ask`` keeps the fp32 question encoder, which must match the reference model); a
paired count says how many questions each side alone gets right.  Dense-search recall@10:
the exact top 10 facts for each test question over int8 fact vectors against those over
fp32 ones.  Not measured here: a policy trained on int8 vectors (training runs differ by
more than the point in question; see DEVELOPERS.md).

Usage: .venv/bin/python scripts/bench_int8.py --store .bench/demo.duckdb [--questions N]
"""
from __future__ import annotations

import argparse
import json
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "scripts"))
from bench_completion import cores, cpu_model  # noqa: E402


def first_hop_facts(graph, row) -> set:
    """Rows of the facts a question's first hop should fetch: touching its named entity,
    with the first relation of its chain."""
    start = graph.entity_index(row.get("start", ""))
    if start is None or "chain" not in row:
        return set()
    rel = row["chain"].split(">")[0]
    facts, _ = graph.neighbours(start)
    return {int(f) for f in facts if graph.relation_names[int(graph.rel[f])] == rel}


def evaluate(hp, rows):
    """The strategies' summary and, per strategy, each question's Hits@1 (0/1), in order."""
    from hopper.env import episodes
    from hopper.train import hits_and_rank

    res = hp.evaluate(rows)["strategies"]
    qs = hp._questions(rows)
    eps = episodes(hp._graph, qs, hp._encode)
    policy = hp._policy()
    hits = {}
    for s in ("policy", "greedy", "walk"):
        outs = hp._solve_many(hp._graph, policy, s, qs, eps)
        hits[s] = np.array([hits_and_rank(o, e.gold)[0] for (_, o, _), e in zip(outs, eps)], float)
        assert abs(hits[s].mean() - res[s]["hits1"]) < 1e-3, (s, hits[s].mean(), res[s]["hits1"])
    return res, hits


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--store", required=True)
    ap.add_argument("--questions", type=int, default=600)
    ap.add_argument("--sample", type=int, default=1000)
    args = ap.parse_args()
    from onnxruntime.quantization import QuantType, quantize_dynamic

    import hopper
    from hopper import embed
    from hopper.env import Graph
    from hopper.index import exact_search

    plain = embed.ensure_fast_model()
    tmp = Path(tempfile.mkdtemp(prefix="hopper-int8-"))
    quantize_dynamic(str(plain), str(tmp / "model.onnx"), weight_type=QuantType.QInt8,
                     per_channel=True, use_external_data_format=False)
    fp32 = embed.Encoder("fast")
    int8 = embed.Encoder("fast")
    int8._fast = embed._OnnxEncoder(tmp / "model.onnx", optimized=False)

    hp = hopper.open_store(args.store)
    graph = Graph.from_store(hp.store).in_memory()
    con = __import__("duckdb").connect(str(hp.path), read_only=True)
    fact_texts = [r[0] for r in con.execute(
        "SELECT f.text FROM facts f JOIN fact_vectors v USING (fact_id) ORDER BY f.fact_id").fetchall()]
    ent_texts = [r[0] for r in con.execute("SELECT name FROM entities ORDER BY entity_id").fetchall()]
    rel_texts = [r[0].replace("_", " ") for r in con.execute(
        "SELECT name FROM relations ORDER BY relation_id").fetchall()]
    con.close()

    sample = fact_texts[: args.sample]
    rates = {}
    for name, enc in (("fp32", fp32), ("int8", int8)):
        enc.encode(sample[:64])
        t = time.perf_counter()
        enc.encode(sample)
        rates[name] = len(sample) / (time.perf_counter() - t)
    q_texts = [json.loads(line)["question"] for line in
               open(ROOT / "factstores/supply/questions_test.jsonl", encoding="utf-8")][: args.questions]
    cos_f = np.sum(fp32.encode(sample) * int8.encode(sample), axis=1)
    cos_q = np.sum(fp32.encode(q_texts) * int8.encode(q_texts), axis=1)

    questions = ROOT / "factstores/supply/questions_test.jsonl"
    rows = [json.loads(line) for line in open(questions, encoding="utf-8")][: args.questions]
    hp._graph, hp._encoder = graph, fp32
    ref, ref_hits = evaluate(hp, rows)
    qv = fp32.encode(q_texts)
    fp32_facts = np.asarray(graph.fact_vecs).copy()
    t = time.perf_counter()
    graph.fact_vecs = int8.encode(fact_texts)
    graph.entity_vecs = int8.encode(ent_texts)
    graph.relation_vecs = int8.encode(rel_texts)
    int8_s = time.perf_counter() - t
    got, got_hits = evaluate(hp, rows)
    top_a = [set(exact_search(fp32_facts, q, 10).tolist()) for q in qv]
    top_b = [set(exact_search(graph.fact_vecs, q, 10).tolist()) for q in qv]
    recall = float(np.mean([len(a & b) / 10 for a, b in zip(top_a, top_b)]))
    # Retrieval quality proper: is a fact of the question's first hop (its named entity and
    # the chain's first relation) among the dense top 10?
    gold = [first_hop_facts(graph, r) for r in rows[: len(qv)]]
    hit_a = np.array([bool(g & t) for g, t in zip(gold, top_a) if g], float)
    hit_b = np.array([bool(g & t) for g, t in zip(gold, top_b) if g], float)

    print("| figure | fp32 | int8 | change |\n|---|---|---|---|")
    print(f"| encode {len(sample)} demo fact texts, texts/s | {rates['fp32']:.0f} | {rates['int8']:.0f} | "
          f"{rates['int8'] / rates['fp32']:.2f}x |")
    print(f"| cosine int8 vs fp32, facts (min / mean) | 1 | {cos_f.min():.4f} / {cos_f.mean():.4f} | |")
    print(f"| cosine int8 vs fp32, questions (min / mean) | 1 | {cos_q.min():.4f} / {cos_q.mean():.4f} | |")
    print(f"| dense top-10 recall@10, int8 fact vectors vs fp32 ({len(qv)} test questions) | 1 | "
          f"{recall:.3f} | {100 * (recall - 1):+.1f} points |")
    print(f"| dense top 10 holds a first-hop gold fact ({len(hit_a)} test questions) | {hit_a.mean():.3f} | "
          f"{hit_b.mean():.3f} | {100 * (hit_b.mean() - hit_a.mean()):+.1f} points (only fp32 "
          f"{int((hit_a > hit_b).sum())}, only int8 {int((hit_b > hit_a).sum())}) |")
    for s in ("policy", "greedy", "walk"):
        a, b = ref[s]["hits1"], got[s]["hits1"]
        d = got_hits[s] - ref_hits[s]
        se = 100 * d.std(ddof=1) / np.sqrt(len(d)) if len(d) > 1 else float("nan")
        print(f"| demo test Hits@1, {s} ({len(rows)} q) | {a:.3f} | {b:.3f} | {100 * (b - a):+.1f} "
              f"points (paired s.e. {se:.1f}; right only with fp32 {int((d < 0).sum())}, "
              f"only with int8 {int((d > 0).sum())}) |")
        for w in ("seen", "new"):
            sel = np.array([r.get("wording") == w for r in rows])
            if sel.any():
                a, b = ref_hits[s][sel].mean(), got_hits[s][sel].mean()
                print(f"| ... {w} wordings ({int(sel.sum())} q) | {a:.3f} | {b:.3f} | "
                      f"{100 * (b - a):+.1f} points |")
    print(f"\nint8 re-embedding of {len(fact_texts) + len(ent_texts) + len(rel_texts)} texts: "
          f"{int8_s:.0f} s")
    print(f"\nmachine: {cores()} cores, {cpu_model()}")
    print(f"reproduce: .venv/bin/python scripts/bench_int8.py --store {args.store} --questions {args.questions}")


if __name__ == "__main__":
    main()

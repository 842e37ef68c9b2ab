#!/usr/bin/env python3
"""Would int8 dynamic quantisation of the encoder pay? Speed, cosine to fp32, and demo Hits@1 lost.

Quantises the cached ONNX export with onnxruntime.quantization.quantize_dynamic (weights
int8, per channel), encodes the same fact texts with both, then re-embeds every text of the
demo store with the int8 model and evaluates the store's trained policy and the baselines on
the demo test split with fp32 vectors and with int8 vectors (questions encoded alike).

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
    ref = hp.evaluate(rows)["strategies"]
    graph.fact_vecs = int8.encode(fact_texts)
    graph.entity_vecs = int8.encode(ent_texts)
    graph.relation_vecs = int8.encode(rel_texts)
    hp._encoder = int8
    got = hp.evaluate(rows)["strategies"]

    print("| figure | fp32 | int8 | change |\n|---|---|---|---|")
    print(f"| encode {len(sample)} demo fact texts, texts/s | {rates['fp32']:.0f} | {rates['int8']:.0f} | "
          f"{rates['int8'] / rates['fp32']:.2f}x |")
    print(f"| cosine int8 vs fp32, facts (min / mean) | 1 | {cos_f.min():.4f} / {cos_f.mean():.4f} | |")
    print(f"| cosine int8 vs fp32, questions (min / mean) | 1 | {cos_q.min():.4f} / {cos_q.mean():.4f} | |")
    for s in ("policy", "greedy", "walk"):
        a, b = ref[s]["hits1"], got[s]["hits1"]
        print(f"| demo test Hits@1, {s} ({len(rows)} q) | {a:.3f} | {b:.3f} | {100 * (b - a):+.1f} points |")
    print(f"\nmachine: {cores()} cores, {cpu_model()}")
    print(f"reproduce: .venv/bin/python scripts/bench_int8.py --store {args.store} --questions {args.questions}")


if __name__ == "__main__":
    main()

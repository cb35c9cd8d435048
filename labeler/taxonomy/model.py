"""The Taxonomy: topics, item placements, and what is needed to place new items.

On disk it is a folder with no pickled objects: tables as Parquet, arrays as ``.npy`` (loaded with
``allow_pickle=False``), and a JSON manifest holding the config, counts, the content-hash
``version`` and the SHA-256 of every file, verified on load.
"""
from __future__ import annotations

import hashlib
import json
import logging
import os
import shutil
import uuid
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from ..distilled import MEAN_ARRAY, TABLE_ARRAY, TOKENIZER_FILE
from ..errors import ArtifactError, InputError
from ..tables import normalize_items
from ..version import __version__

log = logging.getLogger(__name__)

FORMAT = "labeler-taxonomy/1"
ARRAYS = ("centroids", TABLE_ARRAY, MEAN_ARRAY)

TOPICS_SCHEMA = pa.schema([("topic_id", pa.string()), ("level", pa.int32()), ("parent_id", pa.string()),
                           ("name", pa.string()), ("keywords", pa.list_(pa.string())),
                           ("size", pa.int64()), ("first_version", pa.string())])
ITEM_TOPICS_SCHEMA = pa.schema([("item_id", pa.string()), ("level", pa.int32()),
                                ("topic_id", pa.string()), ("confidence", pa.float64())])


def place(vectors: np.ndarray, centroids: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Nearest fine centroid and its cosine similarity (clipped to [0, 1]) for each unit vector."""
    sims = vectors @ centroids.T
    best = np.argmax(sims, axis=1)
    return best, np.clip(sims[np.arange(len(vectors)), best], 0.0, 1.0)


def sha256_file(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for chunk in iter(lambda: f.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def hash_strings(parts) -> str:
    h = hashlib.sha256()
    for p in parts:
        h.update(str(p).encode("utf-8", errors="surrogatepass"))
        h.update(b"\x00")
    return h.hexdigest()


class Taxonomy:
    """Topics at one or two levels, the items placed in them, and (if learned) the placement model.

    Build one with :func:`labeler.build_taxonomy` (from text) or :meth:`from_categories`.
    """

    def __init__(self, topics: pd.DataFrame, item_topics: pd.DataFrame, manifest: dict[str, Any],
                 arrays: dict[str, np.ndarray] | None = None, centroid_topics: list[str] | None = None,
                 tokenizer_json: str | None = None):
        self.topics = topics.sort_values(["level", "topic_id"], kind="stable").reset_index(drop=True)
        self.item_topics = item_topics.sort_values(["item_id", "level", "confidence", "topic_id"],
                                                   ascending=[True, True, False, True],
                                                   kind="stable").reset_index(drop=True)
        self.manifest = manifest
        self.arrays = arrays or {}
        self.centroid_topics = list(centroid_topics or [])
        self.tokenizer_json = tokenizer_json  # the distilled encoder's tokenizer, if it has one

    # -- identity -------------------------------------------------------------------------------
    @property
    def version(self) -> str:
        """Content hash: the same inputs and config give the same version."""
        return self.manifest["version"]

    @property
    def kind(self) -> str:
        return self.manifest["kind"]

    @property
    def levels(self) -> list[int]:
        return sorted(int(v) for v in self.topics["level"].unique())

    def parent_of(self) -> dict[str, str | None]:
        return dict(zip(self.topics["topic_id"], self.topics["parent_id"]))

    def names(self) -> dict[str, str]:
        return dict(zip(self.topics["topic_id"], self.topics["name"]))

    def __repr__(self) -> str:
        counts = self.topics.groupby("level").size().to_dict()
        return f"Taxonomy(kind={self.kind!r}, version={self.version[:12]!r}, topics_per_level={counts})"

    # -- editorial ------------------------------------------------------------------------------
    @classmethod
    def from_categories(cls, items: pd.DataFrame, column: str = "category", sep: str | None = "|",
                        parent_column: str | None = None, source: str = "items") -> "Taxonomy":
        """An editorial taxonomy from a category column (several labels split on ``sep``).

        With ``parent_column`` the parents become level 0 and the categories level 1.

        >>> df = pd.DataFrame({"item_id": ["a", "b", "c"], "category": ["x", "x|y", None]})
        >>> tax = Taxonomy.from_categories(df)
        >>> sorted(tax.topics["name"])
        ['x', 'y']
        """
        if column not in items.columns:
            raise InputError(f"category column '{column}' not found. Columns present: "
                             f"{', '.join(map(str, items.columns))}.", source=source, column=column)
        items, _ = normalize_items(items, text_columns=(), source=source, category=column)
        rows = []
        for item_id, value in zip(items["item_id"], items[column]):
            if value is None or (isinstance(value, float) and np.isnan(value)):
                continue
            labels = [v.strip() for v in (str(value).split(sep) if sep else [str(value)])]
            for k, lab in enumerate(dict.fromkeys(l for l in labels if l)):
                rows.append((item_id, lab, k))
        placed = pd.DataFrame(rows, columns=["item_id", "name", "order"])
        level_of_names = 1 if parent_column else 0
        version = hash_strings([FORMAT, "editorial", column, sep, parent_column,
                                *sorted(f"{i}\x01{n}" for i, n, _ in rows)])
        topic_rows, it_rows = [], []
        parents: dict[str, str] = {}
        if parent_column:
            if parent_column not in items.columns:
                raise InputError(f"parent column '{parent_column}' not found.", source=source,
                                 column=parent_column)
            pmap = dict(zip(items["item_id"], items[parent_column]))
            for name, g in placed.groupby("name"):
                ps = {str(pmap[i]) for i in g["item_id"] if pmap[i] is not None and str(pmap[i]) != "nan"}
                if len(ps) > 1:
                    raise InputError(f"category '{name}' has several parents {sorted(ps)}; a level-1 "
                                     "topic has one parent.", source=source, column=parent_column)
                if ps:
                    parents[name] = ps.pop()
        def tid(level, name):
            return "c" + hashlib.sha1(f"{level}\x00{name}".encode()).hexdigest()[:8]
        # confidence falls with the label's position so the first-listed label is primary
        for item_id, name, order in rows:
            it_rows.append((item_id, level_of_names, tid(level_of_names, name), 1.0 - 1e-3 * order))
            if name in parents:
                it_rows.append((item_id, 0, tid(0, parents[name]), 1.0 - 1e-3 * order))
        for name, g in placed.groupby("name"):
            parent = tid(0, parents[name]) if name in parents else None
            topic_rows.append((tid(level_of_names, name), level_of_names, parent, name, [name],
                               int(g["item_id"].nunique()), version))
        for pname in sorted(set(parents.values())):
            size = int(placed[placed["name"].map(parents).eq(pname)]["item_id"].nunique())
            topic_rows.append((tid(0, pname), 0, None, pname, [pname], size, version))
        topics = pd.DataFrame(topic_rows, columns=list(TOPICS_SCHEMA.names))
        item_topics = pd.DataFrame(it_rows, columns=list(ITEM_TOPICS_SCHEMA.names))
        item_topics = item_topics.drop_duplicates(["item_id", "level", "topic_id"], keep="first")
        manifest = {"format": FORMAT, "kind": "editorial", "version": version,
                    "tool_version": __version__, "source_column": column, "sep": sep,
                    "parent_column": parent_column, "n_items": int(len(items)),
                    "n_unplaced": int(len(items) - placed["item_id"].nunique())}
        return cls(topics, item_topics, manifest)

    @classmethod
    def from_tables(cls, topics: pd.DataFrame, item_topics: pd.DataFrame, name: str = "custom") -> "Taxonomy":
        """A taxonomy from ready tables (topics, item_topics with optional ``valid_from``).

        >>> topics = pd.DataFrame({"topic_id": ["x"], "level": [0], "name": ["knitting"]})
        >>> Taxonomy.from_tables(topics, pd.DataFrame({"item_id": ["a"], "level": [0], "topic_id": ["x"],
        ...                                            "confidence": [1.0]})).levels
        [0]
        """
        topics = topics.copy()
        for col, default in (("parent_id", None), ("keywords", None), ("size", 0), ("first_version", None)):
            if col not in topics.columns:
                topics[col] = default
        missing = sorted(set(item_topics["topic_id"].dropna()) - set(topics["topic_id"]))
        if missing:
            raise InputError(f"item_topics names topics not in the topics table: {missing[:5]}.",
                             source="item_topics", column="topic_id")
        it = item_topics.copy()
        if "confidence" not in it.columns:
            it["confidence"] = 1.0
        it["level"] = it["level"].astype("int32")
        topics["level"] = topics["level"].astype("int32")
        version = hash_strings([FORMAT, "tables", name,
                                topics.sort_values("topic_id").to_csv(index=False),
                                it.sort_values(list(it.columns)).to_csv(index=False)])
        topics["first_version"] = topics["first_version"].fillna(version)
        manifest = {"format": FORMAT, "kind": "tables", "version": version, "tool_version": __version__,
                    "name": name, "n_items": int(it["item_id"].nunique()), "n_unplaced": 0}
        return cls(topics, it, manifest)

    # -- placing new items ----------------------------------------------------------------------
    def assign(self, items: pd.DataFrame, embedder=None, progress: bool = False) -> pd.DataFrame:
        """item_topics rows for ``items`` placed into this taxonomy without refitting.

        Rows under ``min_confidence`` are left out (the item is unplaced); the count is logged and
        kept in ``self.last_assign_stats``.
        """
        if self.kind == "tables":
            raise ArtifactError("this taxonomy was made from ready tables (Taxonomy.from_tables) and "
                                "has no placement model; add item_topics rows for new items instead.")
        if self.kind == "editorial":
            col = self.manifest["source_column"]
            sub = Taxonomy.from_categories(items, column=col, sep=self.manifest["sep"],
                                           parent_column=self.manifest["parent_column"])
            known = set(self.topics["topic_id"])
            out = sub.item_topics[sub.item_topics["topic_id"].isin(known)].reset_index(drop=True)
            self.last_assign_stats = {"items": int(len(items)),
                                      "unplaced": int(len(items) - out["item_id"].nunique())}
            return out
        from ..embed import embed_items
        if embedder is not None and embedder.name != self.manifest["model"]:
            raise ArtifactError(f"taxonomy {self.version[:12]} was built with {self.manifest['model']!r}; items "
                                f"embedded with {embedder.name!r} would be placed in another vector space. "
                                "Leave the embedder out to use the taxonomy's own.")
        cfg = self.manifest["config"]
        items, _ = normalize_items(items, text_columns=tuple(cfg["text_columns"]))
        vectors, _ = embed_items(items, cfg, embedder=embedder or self.embedder(), progress=progress)
        fine, conf = place(vectors, self.arrays["centroids"])
        rows = placement_rows(items["item_id"].to_numpy(), fine, conf, items_empty_text(items, cfg),
                              self.centroid_topics, self.parent_of(), cfg["min_confidence"])
        n_unplaced = int(len(items) - rows["item_id"].nunique())
        self.last_assign_stats = {"items": int(len(items)), "unplaced": n_unplaced}
        log.info("assigned %d items; %d below min_confidence %.2f (a rising share says a rebuild is due)",
                 len(items), n_unplaced, cfg["min_confidence"])
        return rows

    def embedder(self):
        """The embedder this taxonomy was built with, resolved locally."""
        from ..embed import HashingEmbedder, SentenceEmbedder
        name = self.manifest["model"]
        if self.manifest.get("encoder", {}).get("kind") == "distilled":
            from ..distilled import DistilledEncoder
            return DistilledEncoder(self.tokenizer_json, self.arrays[TABLE_ARRAY],
                                    self.manifest["encoder"]["teacher"], self.arrays[MEAN_ARRAY])
        if name.startswith("hashing-"):
            return HashingEmbedder(int(name.split("-")[1]))
        cfg = self.manifest["config"]
        return SentenceEmbedder(name, cfg.get("model_path"), cfg.get("batch_size", 64))

    # -- artifact -------------------------------------------------------------------------------
    def save(self, path: str | os.PathLike) -> Path:
        """Write the taxonomy folder atomically (temp folder, then rename)."""
        dest = Path(path)
        tmp = dest.parent / f".{dest.name}.tmp-{uuid.uuid4().hex}"
        tmp.mkdir(parents=True)
        files = {}
        _write_parquet(self.topics, TOPICS_SCHEMA, tmp / "topics.parquet")
        schema = ITEM_TOPICS_SCHEMA
        if "valid_from" in self.item_topics.columns:
            schema = schema.append(pa.field("valid_from", pa.timestamp("us", tz="UTC")))
        _write_parquet(self.item_topics, schema, tmp / "item_topics.parquet")
        for name in ARRAYS:
            if name in self.arrays:
                np.save(tmp / f"{name}.npy", np.ascontiguousarray(self.arrays[name]), allow_pickle=False)
        if self.centroid_topics:
            (tmp / "centroid_topics.json").write_text(json.dumps(self.centroid_topics))
        if self.tokenizer_json is not None:
            (tmp / TOKENIZER_FILE).write_text(self.tokenizer_json, encoding="utf-8")
        for f in sorted(tmp.iterdir()):
            files[f.name] = sha256_file(f)
        manifest = dict(self.manifest, files=files)
        (tmp / "manifest.json").write_text(json.dumps(manifest, indent=2, sort_keys=True) + "\n")
        if dest.exists():
            old = dest.parent / f".{dest.name}.old-{uuid.uuid4().hex}"
            os.replace(dest, old)
            os.replace(tmp, dest)
            shutil.rmtree(old, ignore_errors=True)
        else:
            os.replace(tmp, dest)
        log.info("wrote taxonomy %s to %s", self.version[:12], dest)
        return dest

    @classmethod
    def load(cls, path: str | os.PathLike) -> "Taxonomy":
        """Read a taxonomy folder, verifying every file's checksum against the manifest."""
        root = Path(path)
        mpath = root / "manifest.json"
        if not mpath.exists():
            raise ArtifactError(f"{root}: not a taxonomy folder (no manifest.json). Build one with "
                                "`labeler taxonomy build`.")
        try:
            manifest = json.loads(mpath.read_text())
        except json.JSONDecodeError as exc:
            raise ArtifactError(f"{mpath}: unreadable manifest ({exc}). Rebuild the taxonomy.") from None
        if manifest.get("format") != FORMAT:
            raise ArtifactError(f"{mpath}: unknown format {manifest.get('format')!r}; expected {FORMAT!r}.")
        for name, digest in manifest.get("files", {}).items():
            f = root / name
            if not f.exists():
                raise ArtifactError(f"{root}: file '{name}' listed in the manifest is missing. "
                                    "The folder is incomplete; copy it again or rebuild.")
            if sha256_file(f) != digest:
                raise ArtifactError(f"{root}: checksum mismatch for '{name}': the file changed after "
                                    "it was written. Copy the taxonomy again or rebuild it.")
        topics = pq.read_table(root / "topics.parquet").to_pandas()
        item_topics = pq.read_table(root / "item_topics.parquet").to_pandas()
        arrays = {n: np.load(root / f"{n}.npy", allow_pickle=False) for n in ARRAYS
                  if (root / f"{n}.npy").exists()}
        ct = root / "centroid_topics.json"
        centroid_topics = json.loads(ct.read_text()) if ct.exists() else []
        tj = root / TOKENIZER_FILE
        tokenizer_json = tj.read_text(encoding="utf-8") if tj.exists() else None
        return cls(topics, item_topics, manifest, arrays, centroid_topics, tokenizer_json)


def _write_parquet(df: pd.DataFrame, schema: pa.Schema, path: Path) -> None:
    """Write without pandas metadata, so the bytes depend on the values only, not on dtypes."""
    table = pa.Table.from_pandas(df[list(schema.names)], schema=schema, preserve_index=False)
    pq.write_table(table.replace_schema_metadata(None), path)


def items_empty_text(items: pd.DataFrame, cfg: dict) -> np.ndarray:
    from ..tables import item_text
    return (item_text(items, cfg["text_columns"]).str.strip() == "").to_numpy()


def placement_rows(item_ids, fine_idx, conf, empty, centroid_topics, parent, min_conf) -> pd.DataFrame:
    """item_topics rows (level 0 and 1) for items placed at fine centroids ``fine_idx``."""
    ok = (conf >= min_conf) & ~empty
    fine_ids = np.asarray(centroid_topics, dtype=object)[fine_idx]
    rows = pd.DataFrame({"item_id": np.asarray(item_ids, dtype=object)[ok], "level": 1,
                         "topic_id": fine_ids[ok], "confidence": np.round(conf[ok].astype(np.float64), 6)})
    coarse = rows.assign(level=0, topic_id=rows["topic_id"].map(parent))
    out = pd.concat([coarse, rows], ignore_index=True)
    return out.sort_values(["item_id", "level"], kind="stable").reset_index(drop=True)

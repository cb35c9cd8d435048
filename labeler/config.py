"""Every setting of the tool, as strict pydantic models validated at the edge.

Precedence, written once here: command-line flag > environment (``LABELER__SECTION__KEY``) >
TOML file > default. Unknown keys are errors, never ignored.
"""
from __future__ import annotations

import datetime as dt
import json
import os
import tomllib
from pathlib import Path
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator

from .errors import ConfigError

ENV_PREFIX = "LABELER__"


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", validate_default=True, frozen=True)

    #: fields that say where things are, not what results mean: left out of version hashes
    _LOCATIONS: frozenset[str] = frozenset()

    def canonical_json(self) -> str:
        """Key-sorted JSON of every field."""
        return json.dumps(self.model_dump(mode="json"), sort_keys=True, separators=(",", ":"))

    def meaning_json(self) -> str:
        """Key-sorted JSON of the fields that change results (no paths): the input of version hashes."""
        return json.dumps(self.model_dump(mode="json", exclude=self._without_meaning()), sort_keys=True,
                          separators=(",", ":"))

    def _without_meaning(self) -> set[str]:
        """The fields that cannot change results as set: the locations, in every settings model."""
        return set(self._LOCATIONS)


class InputConfig(_Strict):
    """How raw input columns are read."""

    timezone: str | None = Field(None, description="IANA zone for naive timestamps; None rejects them.")
    epoch_unit: Literal["s", "ms", "us", "ns"] | None = Field(
        None, description="Unit of integer epoch timestamps; None rejects integer timestamps.")
    text_columns: tuple[str, ...] = ("title", "description", "tags")

    @field_validator("timezone")
    @classmethod
    def _known_zone(cls, v):
        if v is None:
            return v
        from zoneinfo import ZoneInfo, ZoneInfoNotFoundError
        try:
            ZoneInfo(v)
        except (ZoneInfoNotFoundError, ValueError):
            raise ValueError(f"unknown timezone {v!r}; use an IANA name such as 'UTC' or 'Europe/Lisbon'") from None
        return v


class TaxonomyConfig(_Strict):
    _LOCATIONS = frozenset({"embedding_cache", "model_path"})

    """How a taxonomy is learned from item text."""

    text_columns: tuple[str, ...] = ("title", "description", "tags")
    model: str = "all-MiniLM-L6-v2"
    model_path: str | None = Field(None, description="Explicit model folder; wins over models_cache/.")
    embedding_cache: str | None = Field(None, description="Folder of the content-hash embedding cache.")
    batch_size: int = Field(64, ge=1)
    pca_components: int = Field(16, ge=2)
    min_cluster_size: int = Field(5, ge=2)
    min_samples: int | None = Field(2, ge=1)
    cluster_selection: Literal["eom", "leaf"] = "leaf"
    fine_count: Literal["silhouette", "clusters"] = Field(
        "silhouette", description="silhouette: merge HDBSCAN's clusters along a Ward tree to the count with the "
        "best silhouette; clusters: keep HDBSCAN's clusters as fine topics")
    fine_topics: int | None = Field(None, ge=1, description="Level-1 topic count (at most HDBSCAN's cluster "
                                    "count); None chooses it by fine_count.")
    silhouette_sample: int = Field(3000, ge=100, description="items the silhouette is computed on")
    merge_similarity: float | None = Field(None, gt=0.0, le=1.0,
                                           description="merge fine topics whose centres are this similar")
    refine_iterations: int = Field(100, ge=0, description="k-means steps moving HDBSCAN's centres; 0 = none")
    fit_sample_cap: int = Field(50_000, ge=100)
    min_confidence: float = Field(0.2, ge=0.0, le=1.0)
    coarse_topics: int | None = Field(None, ge=1, description="Level-0 topic count; None chooses it.")
    keywords_per_topic: int = Field(10, ge=1)
    name_words: int = Field(3, ge=1)
    id_match_min_jaccard: float = Field(0.3, gt=0.0, le=1.0)
    seed: int = 0
    encoder: Literal["model", "distilled"] = Field(
        "model", description="model: the sentence model embeds every item (accurate, about 150-300 items/s on "
        "2 cores); distilled: a token table distilled from the model on distill_items of the catalog embeds "
        "them all (about 140x faster, AMI within 0.03 of the model's on WordNet nouns)")
    distill_items: int = Field(20_000, ge=100, description="encoder = distilled: catalog items embedded "
                               "with the model to fit the table on (a seeded random sample)")
    distill_ridge: float = Field(0.03, gt=0.0, description="encoder = distilled: pull of the fitted "
                                 "table toward the model's own token vectors")

    def _without_meaning(self) -> set[str]:
        """The distilled encoder's fields count only when it is chosen, so taxonomies built with the
        model keep the versions they had before the option existed."""
        unused = set() if self.encoder == "distilled" else {"encoder", "distill_items", "distill_ridge"}
        return super()._without_meaning() | unused


class LabelConfig(_Strict):
    """The label rules' parameters (DESIGN.md, 'Label rules')."""

    min_support: int = Field(1, ge=1)
    memory_days: float | None = Field(None, gt=0)
    footprint_from: Literal["all", "engaged"] = "all"
    engaged_min: float = 1.0
    warmup: int = Field(1, ge=0)
    multi_topic: Literal["all_new", "any_new"] = "all_new"
    multiplier: float = Field(2.0, ge=1.0, le=1e6)
    boost_on: Literal["new_interest", "discovery"] = "new_interest"
    levels: tuple[int, ...] | None = None
    event_types: tuple[str, ...] | None = None
    label_from: dt.datetime | None = None
    no_boost_topics: tuple[str, ...] = ()
    max_user_events: int | None = Field(None, ge=1, description="set aside users with more interactions "
                                        "than this (bots, shared devices): no labels, no footprint, counted")

    @field_validator("label_from")
    @classmethod
    def _aware(cls, v):
        if v is not None and v.tzinfo is None:
            raise ValueError("label_from needs a timezone, e.g. '2026-03-01T00:00:00Z'")
        return v.astimezone(dt.timezone.utc) if v is not None else v

    @property
    def memory_us(self) -> int | None:
        """The memory window in microseconds (None: never forget)."""
        return None if self.memory_days is None else int(round(self.memory_days * 86_400_000_000))


class GateConfig(_Strict):
    """Thresholds a candidate taxonomy must meet before rollout."""

    max_flip_share: float = Field(0.10, ge=0, le=1)
    min_ami: float = Field(0.5, ge=0, le=1)
    max_unplaced_share: float = Field(0.10, ge=0, le=1)
    max_retired_share: float = Field(0.25, ge=0, le=1)
    min_topic_size: int = Field(5, ge=1)
    levels: tuple[int, ...] | None = Field(None, description="Levels the gate judges (default: every level both "
                                                             "taxonomies have).")


class EngineConfig(_Strict):
    """Where the relational label expressions run."""

    engine: Literal["duckdb", "spark"] = "duckdb"
    label_plan: Literal["windows", "scan"] = Field(
        "scan", description="DuckDB: 'scan' computes the label counts by one sorted pass when the "
        "settings allow (no memory window, no max_user_events), 'windows' always by the relational "
        "windows; both give the same labels")
    scan_min_rows: int = Field(1_000_000, ge=0, description="the 'scan' plan is taken from this many "
                               "interactions on (below, loading the compiled pass costs more than it saves)")
    memory_limit: str = "4GB"
    temp_dir: str | None = None
    threads: int | None = Field(None, ge=1)
    bucket_rows: int | None = Field(2_500_000, ge=1, description="a run over more interactions than this is "
                                    "labelled in pieces of users of about this many interactions (None: one piece)")
    output_compression: Literal["lz4", "zstd"] = Field(
        "lz4", description="the labels and footprints files' Parquet codec: 'zstd' writes them about 40% "
        "smaller and a quarter slower (measured: README, Benchmarks); a change applies to the files written "
        "from then on")
    # Spark only (also read from the environment: SPARK_MASTER)
    spark_master: str | None = Field(None, description="e.g. 'local[4]', 'spark://host:7077', 'yarn'; "
                                     "default $SPARK_MASTER or local[*]")
    executor_memory: str | None = None
    driver_memory: str | None = None
    shuffle_partitions: int = Field(64, ge=1)
    spark_conf: dict[str, str] = Field(default_factory=dict, description="any other spark.* settings")


class RunConfig(_Strict):
    """How the scheduled job (`labeler run`) treats partitions, late data and items over time."""

    taxonomy_from: Literal["text", "categories"] = Field(
        "text", description="first run: learn the taxonomy from item text, or take the category column")
    category_column: str = "category"
    lookback_partitions: int = Field(3, ge=0, description="re-check the last K processed partitions")
    late_horizon_days: float = Field(30.0, gt=0, description="events older than their partition's "
                                     "date minus this are quarantined, not labelled")
    on_bad_partition: Literal["skip", "stop"] = "skip"
    backfill_late_items: bool = False
    refresh_unplaced_share: float = Field(0.2, ge=0, le=1, description="share of new items below "
                                          "min_confidence that makes a taxonomy refresh due")
    store_shards: int = Field(16, ge=1)
    keep_generations: int = Field(3, ge=1, description="output generations (and store snapshots) kept")


class JobConfig(_Strict):
    """Everything one scheduled run needs, loaded from a TOML file.

    Relative paths in a TOML file are relative to that file's folder.
    """

    items: str | None = None
    interactions: str | None = None
    work_dir: str = "labeler-work"
    input: InputConfig = InputConfig()
    taxonomy: TaxonomyConfig = TaxonomyConfig()
    labels: LabelConfig = LabelConfig()
    gate: GateConfig = GateConfig()
    engine: EngineConfig = EngineConfig()
    run: RunConfig = RunConfig()


def _env_overrides(environ: dict[str, str], origins: dict[str, str] | None = None) -> dict[str, Any]:
    """Settings from LABELER__SECTION__KEY variables; ``origins`` gets "section.key" -> variable."""
    out: dict[str, Any] = {}
    for key, raw in environ.items():
        if not key.startswith(ENV_PREFIX):
            continue
        path = key[len(ENV_PREFIX):].lower().split("__")
        try:
            value = json.loads(raw)
        except json.JSONDecodeError:
            value = raw
        node = out
        for part in path[:-1]:
            node = node.setdefault(part, {})
        node[path[-1]] = value
        if origins is not None:
            origins[".".join(path)] = key
    return out


def _merge(base: dict, over: dict) -> dict:
    merged = dict(base)
    for k, v in over.items():
        merged[k] = _merge(merged[k], v) if isinstance(v, dict) and isinstance(merged.get(k), dict) else v
    return merged


def load_job_config(path: str | Path | None = None, flags: dict[str, Any] | None = None,
                    environ: dict[str, str] | None = None) -> JobConfig:
    """Build a JobConfig: flags > environment > TOML file > defaults.

    >>> load_job_config(flags={"labels": {"min_support": 2}}, environ={}).labels.min_support
    2
    """
    data: dict[str, Any] = {}
    source = "defaults"
    if path is not None:
        p = Path(path)
        source = str(p)
        try:
            data = tomllib.loads(p.read_text(encoding="utf-8"))
        except FileNotFoundError:
            raise ConfigError(f"{p}: config file not found. Pass an existing TOML file with --config.") from None
        except tomllib.TOMLDecodeError as exc:
            raise ConfigError(f"{p}: not valid TOML ({exc}). Fix the syntax and run again.") from None
        for key in ("items", "interactions", "work_dir"):
            if isinstance(data.get(key), str) and not Path(data[key]).is_absolute():
                data[key] = str((p.parent / data[key]).resolve())
        tax = data.get("taxonomy")
        if isinstance(tax, dict) and isinstance(tax.get("embedding_cache"), str) \
                and not Path(tax["embedding_cache"]).is_absolute():
            tax["embedding_cache"] = str((p.parent / tax["embedding_cache"]).resolve())
    origins: dict[str, str] = {}
    data = _merge(data, _env_overrides(os.environ if environ is None else environ, origins))
    data = _merge(data, flags or {})
    return validate_config(JobConfig, data, source, origins)


def validate_config(model: type[_Strict], data: dict[str, Any], source: str = "settings",
                    origins: dict[str, str] | None = None):
    """Validate a dict into ``model``, turning pydantic's error into one ConfigError; a value that
    came from the environment names its variable (``origins``: "section.key" -> variable)."""
    try:
        return model.model_validate(data)
    except ValidationError as exc:
        lines = []
        for err in exc.errors():
            where = ".".join(str(p) for p in err["loc"]) or "(root)"
            var = next((v for k, v in (origins or {}).items() if where == k or where.startswith(k + ".")), None)
            via = f" (from environment variable {var})" if var else ""
            if err["type"] == "extra_forbidden":
                lines.append(f"unknown key '{where}'{via}")
            else:
                lines.append(f"'{where}': {err['msg']} (got {err.get('input')!r}){via}")
        raise ConfigError(f"{source}: invalid {model.__name__}: " + "; ".join(lines)
                          + ". See README 'Configuration' for the valid keys.") from None

"""Spark engine specifics: the CLI and the scheduled job on Spark give DuckDB's results, the
canonical content hash is equal across engines, and footprints and the lookup store can be built
from a Spark run. (The golden cases and the MovieLens oracle run on both engines in their own
modules.) Expected differences: none in content; Spark writes its own file names and row groups
under labels/date=.../, so its bytes differ from DuckDB's."""
from __future__ import annotations

import pandas as pd
import pyarrow.parquet as pq
import pytest

from conftest import _have_spark
from labeler import LabelConfig, Taxonomy
from labeler.labels.plan import plan_labels

pytestmark = [pytest.mark.spark, pytest.mark.skipif(not _have_spark(), reason="PySpark or Java missing")]

KEYS = ["user_id", "ts", "event_id", "item_id", "level"]


def _rows(df: pd.DataFrame) -> pd.DataFrame:
    cols = KEYS + ["topic_id", "label", "engaged", "discovery", "reward_multiplier", "shaped_reward",
                   "history_len", "known_topics", "taxonomy_version", "labels_version"]
    out = df[cols].sort_values(KEYS, na_position="last").reset_index(drop=True)
    out["ts"] = pd.to_datetime(out["ts"], utc=True)
    return out.astype(object).where(out.notna(), None)


@pytest.fixture(scope="module")
def ml(request):
    from external import movielens_100k
    ratings, movies = movielens_100k()
    return ratings.rename(columns={"rating": "engagement"}), Taxonomy.from_categories(movies, column="genres")


def test_content_hash_equal_across_engines(ml, spark_engine):
    """MovieLens 100K: the canonical labels hash is the same on DuckDB and on Spark."""
    log, tax = ml
    cfg = LabelConfig(min_support=2, memory_days=30)
    a = plan_labels(log, tax, cfg)
    b = plan_labels(log, tax, cfg, engine=spark_engine)
    assert a.content_hash() == b.content_hash()
    pd.testing.assert_frame_equal(a.footprints_frame().drop(columns="recent_us"),
                                  b.footprints_frame().drop(columns="recent_us"))


def test_cli_label_on_spark_writes_the_same_rows(cli, fixtures, tmp_path, spark_engine):
    """`labeler label --engine spark` writes labels/date=... Parquet from the executors with the
    same rows as DuckDB, and a store built from the Spark run answers like the DuckDB one."""
    tax = Taxonomy.from_categories(pd.read_csv(fixtures / "items.csv"))
    tax.save(tmp_path / "tax")
    for engine in ("duckdb", "spark"):
        code, out, err = cli("label", "--taxonomy", tmp_path / "tax", "--interactions", fixtures / "interactions.csv",
                             "--out", tmp_path / engine, "--engine", engine, "--store", tmp_path / f"store-{engine}", "-q")
        assert code == 0, err
    a = pq.read_table(tmp_path / "duckdb" / "labels").to_pandas()
    b = pq.read_table(tmp_path / "spark" / "labels").to_pandas()
    assert sorted(p.name for p in (tmp_path / "spark" / "labels").iterdir() if p.is_dir()) == \
        sorted(p.name for p in (tmp_path / "duckdb" / "labels").iterdir())
    pd.testing.assert_frame_equal(_rows(a), _rows(b))
    import json
    sa = json.loads((tmp_path / "duckdb" / "summary.json").read_text())
    sb = json.loads((tmp_path / "spark" / "summary.json").read_text())
    assert sa["outputs"]["labels_content_hash"] == sb["outputs"]["labels_content_hash"]
    from labeler import open_store
    x, y = open_store(tmp_path / "store-duckdb"), open_store(tmp_path / "store-spark")
    for user in sorted(set(a["user_id"])):
        assert x.classify(user, sorted(set(a["item_id"]))) == y.classify(user, sorted(set(a["item_id"])))


def test_job_on_spark_writes_duckdbs_bytes(tmp_path, spark_engine, monkeypatch):
    """The scheduled job with engine = "spark": after a first and an incremental run, its outputs
    are byte-identical to the same runs on DuckDB (the job writes its own Parquet files), and the
    label rows and a full run's footprints and histories are written from the executors: no row
    stream is ever collected to the driver (streaming one would fail this test)."""
    from labeler import JobConfig
    from labeler.engines import SparkEngine

    def no_collect(self, expr, rows=65_536):
        raise AssertionError("the job streamed rows from Spark to the driver")
    monkeypatch.setattr(SparkEngine, "to_batches", no_collect)
    from labeler.demo import generate_scenario, write_daily
    from labeler.job import run_job
    from test_job import assert_same_outputs
    s = generate_scenario(7, n_items=300, n_users=60, weeks=4)
    s.items.to_parquet(tmp_path / "items.parquet", index=False)
    cut = (pd.to_datetime(s.interactions["ts"]).max() - pd.Timedelta(days=5)).strftime("%Y-%m-%d")
    write_daily(s.interactions, tmp_path / "daily", until=cut)

    def cfg(work, engine):
        extra = {"spark_master": "local[2]", "shuffle_partitions": 4} if engine == "spark" else {}
        return JobConfig(items=str(tmp_path / "items.parquet"), interactions=str(tmp_path / "daily"),
                         work_dir=str(tmp_path / work), run={"taxonomy_from": "categories"},
                         labels={"min_support": 2, "memory_days": 7}, engine={"engine": engine, **extra})
    for engine in ("duckdb", "spark"):
        run_job(cfg(engine, engine))
    write_daily(s.interactions, tmp_path / "daily", since=cut)
    for engine in ("duckdb", "spark"):
        assert run_job(cfg(engine, engine)).manifest["mode"] == "incremental"
    assert_same_outputs(tmp_path / "duckdb", tmp_path / "spark")

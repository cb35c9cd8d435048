"""Shared helpers: fixture paths and running the CLI in-process."""
from __future__ import annotations

import contextlib
import io
from pathlib import Path

import pytest

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"


@pytest.fixture
def fixtures() -> Path:
    return FIXTURES


@pytest.fixture
def cli():
    """Run ``labeler ARGS`` in-process; returns (exit code, stdout, stderr)."""
    from labeler.cli import main

    def run(*args: str):
        out, err = io.StringIO(), io.StringIO()
        with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
            try:
                code = main([str(a) for a in args])
            except SystemExit as exc:  # argparse usage errors
                code = exc.code
        return code, out.getvalue(), err.getvalue()
    return run


@pytest.fixture
def hashing():
    from labeler.embed import HashingEmbedder
    return HashingEmbedder(128)


def _have_spark() -> bool:
    import importlib.util
    import shutil
    return importlib.util.find_spec("pyspark") is not None and shutil.which("java") is not None


# "duckdb" labels by the sorted pass where the settings allow (labeler/labels/scan.py), "duckdb-windows" by
# the relational windows always: every engine-parametrized test holds both plans to the same results
ENGINES = ["duckdb", "duckdb-windows", pytest.param("spark", marks=[pytest.mark.spark, pytest.mark.skipif(
    not _have_spark(), reason="PySpark or Java missing (install the 'spark' extra)")])]


@pytest.fixture(scope="session")
def spark_engine():
    """One local Spark engine for the whole test session (2 cores, few shuffle partitions)."""
    from labeler.config import EngineConfig
    from labeler.engines import make_engine
    return make_engine(EngineConfig(engine="spark", spark_master="local[2]", shuffle_partitions=4,
                                    driver_memory="2g"))


@pytest.fixture(params=ENGINES)
def engine_name(request):
    return request.param


@pytest.fixture
def on_engine(engine_name, request, monkeypatch):
    """Make label_interactions / build_footprints / plan_labels run on the parametrized engine."""
    import labeler.labels.plan as labelling
    if engine_name == "spark":
        eng = request.getfixturevalue("spark_engine")
        monkeypatch.setattr(labelling, "make_engine", lambda *a, **k: eng)
    if engine_name.startswith("duckdb"):  # the sorted pass for small logs too, or the windows
        from labeler.config import EngineConfig
        make = labelling.make_engine
        conf = EngineConfig(label_plan="windows") if engine_name == "duckdb-windows" else EngineConfig(scan_min_rows=0)
        monkeypatch.setattr(labelling, "make_engine", lambda *a, **k: make(conf))
    return engine_name


_DATASET_FIXTURES = {"movielens", "ml"}  # fixtures that fetch an open dataset (tests/external.py)


def pytest_collection_modifyitems(items):
    """Tests on an open dataset are in the 'external' group, whether or not they say so."""
    for item in items:
        if _DATASET_FIXTURES & set(getattr(item, "fixturenames", ())):
            item.add_marker(pytest.mark.external)

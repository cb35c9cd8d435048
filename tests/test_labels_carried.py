"""Labels continued from carried state equal the labels of the whole history (the job's daily path).

The history is cut at a time W; the footprints and per-user counts as of W are carried, and only
the events after W are labelled from them (``plan_labels(..., carried=Carried(...))``). The rows
after W, and the footprints at the end, must equal a run over the whole log.

Outside check: MovieLens 100K (GroupLens; Harper & Konstan, ACM TiiS 2015), genres as an editorial
multi-label taxonomy, for every configuration of the oracle suite plus memory with min_support > 1,
on every engine (DuckDB with the sorted pass and with the windows, Spark). Property check: random
small logs with dense ties and multi-topic items (DuckDB).
"""
from __future__ import annotations

import pandas as pd
import pyarrow as pa
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from labeler import LabelConfig, Taxonomy
from labeler.errors import InputError
from labeler.labels.plan import Carried, plan_labels
from labelcases import T0, taxonomy
from test_labels_oracle import CONFIGS as ORACLE_CONFIGS

CONFIGS = {**ORACLE_CONFIGS, "support3_memory20": {"min_support": 3, "memory_days": 20}}


def continued(log: pd.DataFrame, tax, cfg: LabelConfig, cut: pd.Timestamp):
    """(labels after ``cut``, footprints at the end) labelled from the state carried at ``cut``."""
    ts = pd.to_datetime(log["ts"], utc=True)
    before = plan_labels(log[ts <= cut], tax, cfg)
    state = Carried(before.footprints_arrow(), pa.Table.from_pandas(before.history_frame(), preserve_index=False),
                    before.as_of_us)
    end = pd.Timestamp(ts.max())
    after = plan_labels(log[ts > cut], tax, cfg, carried=state, as_of=end)
    return after.labels_frame(), after.footprints_frame()


def comparable(df: pd.DataFrame) -> pd.DataFrame:
    out = df.drop(columns=[c for c in ("labels_version", "recent_us") if c in df.columns]).reset_index(drop=True)
    return out.astype(object).where(out.notna(), None)


def assert_continued_equals_whole(log: pd.DataFrame, tax, cfg: LabelConfig, cut: pd.Timestamp) -> None:
    whole = plan_labels(log, tax, cfg)
    want, want_fp = whole.labels_frame(), whole.footprints_frame()
    got, got_fp = continued(log, tax, cfg, cut)
    want = want[pd.to_datetime(want["ts"], utc=True) > cut]
    pd.testing.assert_frame_equal(comparable(got), comparable(want))
    want_fp = want_fp[want_fp["user_id"].isin(set(got_fp["user_id"]))]
    pd.testing.assert_frame_equal(comparable(got_fp), comparable(want_fp))
    assert [list(x) for x in got_fp["recent_us"]] == [list(x) for x in want_fp["recent_us"]]


@pytest.fixture(scope="module")
def movielens():
    from external import movielens_100k
    ratings, movies = movielens_100k()
    return ratings.rename(columns={"rating": "engagement"}), Taxonomy.from_categories(movies, column="genres")


@pytest.mark.external
@pytest.mark.parametrize("name", sorted(CONFIGS))
def test_movielens_continued_from_state_equals_the_whole_history(movielens, name, on_engine):
    """MovieLens 100K (GroupLens), cut at the 80th percentile of time: the rows after the cut and
    the final footprints equal a run over all 100,000 ratings."""
    log, tax = movielens
    cut = pd.to_datetime(log["ts"], utc=True).quantile(0.8).floor("s")
    assert_continued_equals_whole(log, tax, LabelConfig(**CONFIGS[name]), cut)


TAX = taxonomy({"a": [("x", 1.0)], "b": [("y", 1.0)], "c": [("x", 0.9), ("z", 0.8)], "d": [("z", 1.0)]})
events = st.lists(st.tuples(st.sampled_from(["u1", "u2", "u3"]), st.sampled_from(["a", "b", "c", "d", "q"]),
                            st.integers(0, 12), st.sampled_from([-1.0, 0.0, 0.5, 1.0, 2.0]),
                            st.sampled_from(["e1", "e2"])), min_size=2, max_size=30)
configs = st.builds(dict, min_support=st.integers(1, 3), memory_days=st.sampled_from([None, 0.125, 0.25]),
                    footprint_from=st.sampled_from(["all", "engaged"]), warmup=st.integers(0, 3),
                    multi_topic=st.sampled_from(["all_new", "any_new"]))


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(events, configs, st.integers(0, 11))
def test_random_logs_continued_from_state_equal_the_whole_history(evs, cfg, cut_hour):
    """Random logs with dense ties, duplicates and a multi-topic item, cut at any hour: continuing
    from the carried state gives the whole history's rows after the cut (DuckDB)."""
    log = pd.DataFrame([{"user_id": u, "item_id": i, "ts": T0 + pd.Timedelta(hours=h), "engagement": e,
                         "event_id": eid} for u, i, h, e, eid in evs])
    cut = T0 + pd.Timedelta(hours=cut_hour)
    ts = pd.to_datetime(log["ts"], utc=True)
    if not (ts <= cut).any() or not (ts > cut).any():
        return
    assert_continued_equals_whole(log, TAX, LabelConfig(**cfg), pd.Timestamp(ts[ts <= cut].max()))


def test_an_event_not_after_the_carried_watermark_is_refused():
    """Continuing from state with an event at the watermark itself is an input error naming ts."""
    log = pd.DataFrame({"user_id": ["u1", "u1"], "item_id": ["a", "b"], "ts": [T0, T0 + pd.Timedelta(hours=1)]})
    before = plan_labels(log.iloc[:1], TAX)
    state = Carried(before.footprints_arrow(), pa.Table.from_pandas(before.history_frame(), preserve_index=False),
                    before.as_of_us)
    with pytest.raises(InputError, match="not after the carried watermark") as err:
        plan_labels(log.iloc[:1], TAX, carried=state)
    assert err.value.column == "ts"

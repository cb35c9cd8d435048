"""Property tests (hypothesis) of the label rules on random small logs with dense ties and duplicates.

Engine scope, declared: these run on DuckDB only. Each hypothesis example is a separate label run,
and on Spark each run costs several seconds of job scheduling, so 25 examples x 5 properties would
add many minutes. On Spark the rules are held to the same results through the golden cases and the
MovieLens oracle, which run on both engines, and through the equal canonical hash.
"""
from __future__ import annotations

import pandas as pd
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from labeler import LabelConfig, label_interactions
from labelcases import T0, taxonomy

TAX = taxonomy({"a": [("x", 1.0)], "b": [("y", 1.0)], "c": [("x", 0.9), ("z", 0.8)], "d": [("z", 1.0)]})
SETTINGS = settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])

events = st.lists(st.tuples(st.sampled_from(["u1", "u2"]), st.sampled_from(["a", "b", "c", "d", "q"]),
                            st.integers(0, 6),  # few distinct times: dense ties
                            st.sampled_from([-1.0, 0.0, 0.5, 1.0, 2.0]),
                            st.sampled_from(["e1", "e2"])), min_size=1, max_size=25)


def frame(evs) -> pd.DataFrame:
    return pd.DataFrame([{"user_id": u, "item_id": i, "ts": T0 + pd.Timedelta(hours=h), "engagement": e,
                          "event_id": eid} for u, i, h, e, eid in evs])


KEY = ["user_id", "item_id", "ts", "event_id", "level"]


@SETTINGS
@given(events, st.randoms(use_true_random=False))
def test_labels_do_not_depend_on_input_row_order(evs, rnd):
    """Shuffling the input rows gives the same labels table."""
    df = frame(evs)
    shuffled = df.sample(frac=1.0, random_state=rnd.randint(0, 10_000)).reset_index(drop=True)
    a = label_interactions(df, TAX)
    b = label_interactions(shuffled, TAX)
    pd.testing.assert_frame_equal(a, b)


@SETTINGS
@given(events)
def test_renaming_topic_ids_changes_only_the_ids(evs):
    """Renaming topics x, y, z changes the topic_id column and nothing else."""
    renamed = taxonomy({"a": [("r1", 1.0)], "b": [("r2", 1.0)], "c": [("r1", 0.9), ("r3", 0.8)], "d": [("r3", 1.0)]})
    a = label_interactions(frame(evs), TAX)
    b = label_interactions(frame(evs), renamed)
    back = b["topic_id"].map({"r1": "x", "r2": "y", "r3": "z"})
    assert a["topic_id"].fillna("-").tolist() == back.fillna("-").tolist()
    cols = [c for c in a.columns if c not in ("topic_id", "taxonomy_version", "labels_version")]
    pd.testing.assert_frame_equal(a[cols], b[cols])


@SETTINGS
@given(events, events, st.sampled_from([LabelConfig(), LabelConfig(min_support=2, memory_days=0.2),
                                        LabelConfig(multi_topic="any_new", warmup=2)]))
def test_appending_later_interactions_never_changes_earlier_labels(first, later, cfg):
    """Interactions after the end of a log leave the labels of that log unchanged."""
    df = frame(first)
    tail = frame(later)
    tail["ts"] = tail["ts"] + pd.Timedelta(days=1)
    a = label_interactions(df, TAX, cfg)
    b = label_interactions(pd.concat([df, tail], ignore_index=True), TAX, cfg)
    b = b[b["ts"] <= df["ts"].max()].reset_index(drop=True)
    cols = [c for c in a.columns if c != "labels_version"]
    pd.testing.assert_frame_equal(a[cols], b[cols])


@SETTINGS
@given(events)
def test_first_visit_to_a_topic_is_new_then_in_profile(evs):
    """min_support=1, no memory, single-topic items: first interaction in a topic after warmup is new, later in_profile."""
    single = taxonomy({"a": [("x", 1.0)], "b": [("y", 1.0)], "d": [("z", 1.0)]})
    out = label_interactions(frame(evs), single, LabelConfig(warmup=0))
    placed = out[out["label"] != "unplaced"]
    for (_, _), g in placed.groupby(["user_id", "topic_id"]):
        first_ts = g["ts"].min()
        assert (g.loc[g["ts"] == first_ts, "label"] == "new_interest").all()
        assert (g.loc[g["ts"] > first_ts, "label"] == "in_profile").all()


@SETTINGS
@given(events, st.sampled_from([LabelConfig(), LabelConfig(boost_on="discovery", multiplier=5.0)]))
def test_shaped_reward_is_engagement_unless_new_interest(evs, cfg):
    """shaped_reward = engagement when the label is not new_interest, and never amplifies engagement <= 0."""
    df = frame(evs).drop_duplicates(["user_id", "item_id", "ts", "event_id"])
    out = label_interactions(df, TAX, cfg).merge(
        df.rename(columns={"engagement": "eng_in"}), on=["user_id", "item_id", "ts", "event_id"])
    other = out[out["label"] != "new_interest"]
    assert (other["shaped_reward"] == other["eng_in"]).all()
    assert (out.loc[out["eng_in"] <= 0, "shaped_reward"] == out.loc[out["eng_in"] <= 0, "eng_in"]).all()



PLAN_CONFIGS = [LabelConfig(), LabelConfig(min_support=2), LabelConfig(min_support=3, warmup=2),
                LabelConfig(footprint_from="engaged", engaged_min=1.0), LabelConfig(multi_topic="any_new"),
                LabelConfig(boost_on="discovery", no_boost_topics=("z",)),
                LabelConfig(event_types=("view",)), LabelConfig(label_from=T0 + pd.Timedelta(hours=3))]


def _plan_results(log: pd.DataFrame, cfg: LabelConfig, plan: str, cut: pd.Timestamp) -> list[pd.DataFrame]:
    """Labels and footprints of the whole log, then of the events after ``cut`` continued from the
    state carried at ``cut``, on DuckDB with label_plan ``plan``."""
    import pyarrow as pa

    from labeler.config import EngineConfig
    from labeler.engines import make_engine
    from labeler.labels.plan import Carried, plan_labels
    eng = make_engine(EngineConfig(label_plan=plan, scan_min_rows=0))
    whole = plan_labels(log, TAX, cfg, engine=eng)
    assert whole.scan == (plan == "scan")
    out = [whole.labels_frame(), whole.footprints_frame()]
    early, late = log[log["ts"] <= cut], log[log["ts"] > cut]
    if len(early) and len(late):
        before = plan_labels(early, TAX, cfg, engine=eng)
        if before.as_of_us is not None:  # some event of the early part is labelled
            state = Carried(before.footprints_arrow(),
                            pa.Table.from_pandas(before.history_frame(), preserve_index=False), before.as_of_us)
            after = plan_labels(late, TAX, cfg, engine=eng, carried=state, as_of=log["ts"].max())
            out += [after.labels_frame(), after.footprints_frame()]
    return out


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(events, st.sampled_from(PLAN_CONFIGS), st.integers(0, 7), st.booleans(),
       st.sampled_from(["as_they_come", "three_at_a_time", "three_and_sequences_in_parts"]))
def test_the_sorted_pass_equals_the_windows(evs, cfg, cut_hour, dedupe, batches):
    """labeler/labels/scan.py's sorted pass gives the relational windows' labels and footprints, on logs
    with duplicate events (handed back to the collapse) and without, continued from state carried
    at a cut, and streamed three rows at a time with every chunk written to a scratch file, also
    with every user's sequence longer than two rows scanned in parts (cut at a change of time,
    its counts carried by stand-in rows): the windows are the rules as written (labeler/labels/rules.py)."""
    from unittest import mock

    import labeler.labels.scan as scan
    df = frame(evs)
    df["event_type"] = ["view" if k % 3 else "click" for k in range(len(df))]
    if dedupe:
        df = df.drop_duplicates(["user_id", "item_id", "ts", "event_id"])
    cut = T0 + pd.Timedelta(hours=cut_hour)
    small = batches != "as_they_come"
    with mock.patch.object(scan, "BATCH_ROWS", 3 if small else scan.BATCH_ROWS), \
            mock.patch.object(scan, "LONG_ROWS", 2 if batches == "three_and_sequences_in_parts" else scan.LONG_ROWS), \
            mock.patch.object(scan, "_bytes", (lambda limit: 0) if small else scan._bytes):
        got = _plan_results(df, cfg, "scan", cut)
    for a, b in zip(got, _plan_results(df, cfg, "windows", cut)):
        pd.testing.assert_frame_equal(a, b)

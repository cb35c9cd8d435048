"""Hand-computed golden cases, one per rule and boundary of DESIGN.md 'Label rules'.

Each expected row was worked out by hand from the rules; times are minutes after 2026-03-02 00:00 UTC.
"""
from __future__ import annotations

import pandas as pd
import pytest

from labeler import LabelConfig, build_footprints, label_interactions
from labelcases import T0, log, rows, taxonomy

@pytest.fixture(autouse=True)
def _each_engine(on_engine):
    """Every golden case runs on DuckDB (the sorted pass and the windows) and on Spark (local mode):
    no expected differences."""
    return on_engine


TAX = taxonomy({"k1": [("knit", 1.0)], "k2": [("knit", 1.0)], "b1": [("bonsai", 1.0)],
                "b2": [("bonsai", 1.0)], "s1": [("bread", 1.0)],
                "m1": [("knit", 0.9), ("bonsai", 0.8)]})


def test_same_timestamp_interactions_never_see_each_other():
    """Two interactions at one instant: neither is in the other's footprint or history."""
    out = label_interactions(log(("u", "s1", 0), ("u", "k1", 10), ("u", "k2", 10)), TAX)
    assert rows(out, "item_id", "label", "history_len", "known_topics") == [
        ("s1", "cold_start", 0, 0), ("k1", "new_interest", 1, 1), ("k2", "new_interest", 1, 1)]


def test_memory_window_lower_bound_is_inclusive():
    """With memory_days=1 an interaction exactly one day earlier still counts; a microsecond later it does not."""
    one_day = 24 * 60
    cfg = LabelConfig(memory_days=1, warmup=0)
    exact = label_interactions(log(("u", "k1", 0), ("u", "k2", one_day)), TAX, cfg)
    assert rows(exact, "item_id", "label") == [("k1", "new_interest"), ("k2", "in_profile")]
    late = log(("u", "k1", 0), ("u", "k2", one_day))
    late.loc[1, "ts"] += pd.Timedelta(microseconds=1)
    out = label_interactions(late, TAX, cfg)
    assert rows(out, "item_id", "label", "known_topics") == [("k1", "new_interest", 0),
                                                             ("k2", "new_interest", 0)]


def test_repeated_views_count_under_min_support():
    """With min_support=2 a topic is new until two earlier interactions, repeats of an item included."""
    out = label_interactions(log(("u", "k1", 0), ("u", "k1", 1), ("u", "k1", 2)), TAX,
                             LabelConfig(min_support=2, warmup=0))
    assert rows(out, "label", "known_topics") == [("new_interest", 0), ("new_interest", 0),
                                                  ("in_profile", 1)]


def test_unplaced_rows_count_in_history_but_never_in_footprints():
    """An unknown item is unplaced, counts in history_len (ending cold start) and adds no topic."""
    out = label_interactions(log(("u", "zz", 0), ("u", "k1", 1), ("u", "k2", 2)), TAX)
    assert rows(out, "item_id", "label", "topic_id", "history_len", "known_topics") == [
        ("zz", "unplaced", None, 0, 0), ("k1", "new_interest", "knit", 1, 0),
        ("k2", "in_profile", "knit", 2, 1)]


@pytest.mark.parametrize("mode,expected", [("all_new", ("in_profile", "knit")),
                                           ("any_new", ("new_interest", "bonsai"))])
def test_multi_topic_all_new_vs_any_new_names_the_topic(mode, expected):
    """m1 is knit (0.9) and bonsai (0.8); knit known: all_new -> in_profile knit, any_new -> new bonsai."""
    out = label_interactions(log(("u", "s1", 0), ("u", "k1", 1), ("u", "m1", 2)), TAX,
                             LabelConfig(multi_topic=mode))
    assert rows(out, "label", "topic_id")[-1] == expected


def test_multi_topic_item_adds_all_its_topics():
    """After m1 (knit and bonsai) both topics are known."""
    out = label_interactions(log(("u", "m1", 0), ("u", "b1", 1), ("u", "k1", 2)), TAX, LabelConfig(warmup=0))
    assert rows(out, "label", "known_topics") == [("new_interest", 0), ("in_profile", 2), ("in_profile", 2)]


def test_new_interest_with_both_topics_unknown_names_the_primary():
    """For a new item with no known topic the label names its highest-confidence topic."""
    out = label_interactions(log(("u", "s1", 0), ("u", "m1", 1)), TAX)
    assert rows(out, "label", "topic_id")[-1] == ("new_interest", "knit")


@pytest.mark.parametrize("engagement,multiplier,shaped", [(-1.0, 1.0, -1.0), (0.0, 1.0, 0.0),
                                                         (0.5, 2.0, 1.0), (2.0, 2.0, 4.0)])
def test_negative_or_zero_engagement_never_amplified(engagement, multiplier, shaped):
    """A new interest is boosted only when engagement > 0; shaped_reward = engagement x multiplier."""
    out = label_interactions(log(("u", "s1", 0), ("u", "k1", 1, engagement)), TAX)
    last = out.iloc[-1]
    assert (last["label"], last["reward_multiplier"], last["shaped_reward"]) == (
        "new_interest", multiplier, shaped)
    assert last["discovery"] == (engagement >= 1.0)


def test_boost_on_discovery_requires_engaged():
    """With boost_on=discovery a weak new interest (0.5 < engaged_min) is not boosted."""
    out = label_interactions(log(("u", "s1", 0), ("u", "k1", 1, 0.5), ("u", "b1", 2, 1.0)), TAX,
                             LabelConfig(boost_on="discovery"))
    assert rows(out, "label", "reward_multiplier", "discovery") == [
        ("cold_start", 1.0, False), ("new_interest", 1.0, False), ("new_interest", 2.0, True)]


def test_engaged_only_footprints():
    """With footprint_from=engaged a weak view does not make the topic known."""
    cfg = LabelConfig(footprint_from="engaged", engaged_min=1.0, warmup=0)
    out = label_interactions(log(("u", "k1", 0, 0.5), ("u", "k2", 1, 1.0), ("u", "k1", 2, 1.0)), TAX, cfg)
    assert rows(out, "label") == [("new_interest",), ("new_interest",), ("in_profile",)]


def test_engaged_min_is_inclusive():
    """engaged = engagement >= engaged_min."""
    out = label_interactions(log(("u", "k1", 0, 4.0), ("u", "b1", 1, 3.999)), TAX, LabelConfig(engaged_min=4.0))
    assert out["engaged"].tolist() == [True, False]


def test_warmup_rows_build_the_footprint():
    """Interactions in the warmup are cold_start but still make their topics known."""
    out = label_interactions(log(("u", "k1", 0), ("u", "b1", 1), ("u", "k2", 2), ("u", "s1", 3)), TAX,
                             LabelConfig(warmup=2))
    assert rows(out, "label") == [("cold_start",), ("cold_start",), ("in_profile",), ("new_interest",)]


def test_no_boost_topics_on_a_multi_topic_item():
    """A new interest whose item has any topic in no_boost_topics is labelled but never boosted."""
    out = label_interactions(log(("u", "s1", 0), ("u", "m1", 1, 2.0)), TAX,
                             LabelConfig(no_boost_topics=("bonsai",)))
    last = out.iloc[-1]
    assert (last["label"], last["topic_id"], last["reward_multiplier"], last["shaped_reward"],
            last["discovery"]) == ("new_interest", "knit", 1.0, 2.0, True)


def test_no_boost_topics_cover_children_through_their_parent():
    """A level-1 topic whose parent is in no_boost_topics is not boosted either."""
    tax = taxonomy({"f1": [("finance/loans", 1.0)], "g1": [("garden/veg", 1.0)]},
                   parents={"finance/loans": "finance", "garden/veg": "garden"}, level=1)
    out = label_interactions(log(("u", "g1", 0), ("u", "f1", 1)), tax, LabelConfig(no_boost_topics=("finance",)))
    fine = out[out["level"] == 1]
    assert rows(fine, "item_id", "label", "reward_multiplier") == [("g1", "cold_start", 1.0),
                                                                   ("f1", "new_interest", 1.0)]


def test_label_from_writes_later_rows_only_but_earlier_ones_build_the_footprint():
    """Rows before label_from are not written; they still count in footprints and history."""
    cfg = LabelConfig(label_from=(T0 + pd.Timedelta(minutes=2)).to_pydatetime())
    out = label_interactions(log(("u", "k1", 0), ("u", "b1", 1), ("u", "k2", 2), ("u", "s1", 3)), TAX, cfg)
    assert rows(out, "item_id", "label", "history_len", "known_topics") == [
        ("k2", "in_profile", 2, 2), ("s1", "new_interest", 3, 2)]


def test_event_types_filter_drops_and_counts_other_rows():
    """With event_types set, other rows are not interactions: dropped and counted."""
    from labeler.labels.plan import plan_labels
    run = plan_labels(log(("u", "k1", 0, 1.0, "e1", "play"), ("u", "b1", 1, 1.0, "e2", "preview"),
                          ("u", "b2", 2, 1.0, "e3", "play")), TAX, LabelConfig(event_types=("play",)))
    out = run.labels_frame()
    assert rows(out, "item_id", "label", "history_len") == [("k1", "cold_start", 0), ("b2", "new_interest", 1)]
    assert run.counts["dropped_event_type"] == 1


def test_duplicate_events_collapse_to_one_keeping_highest_engagement():
    """Rows with the same user, item, ts and event_id are one event: the highest engagement is kept."""
    from labeler.labels.plan import plan_labels
    run = plan_labels(log(("u", "k1", 0, 0.5, "e1"), ("u", "k1", 0, 2.0, "e1"), ("u", "b1", 1, 1.0, "e2")), TAX)
    out = run.labels_frame()
    assert rows(out, "item_id", "shaped_reward", "history_len") == [("k1", 2.0, 0), ("b1", 2.0, 1)]
    assert run.counts["duplicate_events_collapsed"] == 1


def test_output_order_user_ts_event_id_item_level():
    """Rows are sorted by user_id, ts, event_id, item_id, level."""
    tax = taxonomy({"k1": [("knit/cables", 1.0)], "b1": [("bonsai/wiring", 1.0)]},
                   parents={"knit/cables": "knit", "bonsai/wiring": "bonsai"}, level=1)
    out = label_interactions(log(("v", "k1", 0, 1.0, "e9"), ("u", "k1", 5, 1.0, "e2"), ("u", "b1", 5, 1.0, "e1")),
                             tax)
    assert rows(out, "user_id", "event_id", "level") == [("u", "e1", 0), ("u", "e1", 1), ("u", "e2", 0),
                                                         ("u", "e2", 1), ("v", "e9", 0), ("v", "e9", 1)]


def test_as_of_item_topics_follow_valid_from():
    """With valid_from, an interaction uses the item's topics valid at its time."""
    from labeler.taxonomy import Taxonomy
    topics = pd.DataFrame({"topic_id": ["knit", "bonsai"], "level": 0, "name": ["knit", "bonsai"]})
    it = pd.DataFrame({"item_id": ["x", "x", "k1"], "level": 0, "topic_id": ["knit", "bonsai", "knit"],
                       "confidence": 1.0,
                       "valid_from": [None, T0 + pd.Timedelta(minutes=5), None]})
    tax = Taxonomy.from_tables(topics, it)
    out = label_interactions(log(("u", "k1", 0), ("u", "x", 1), ("u", "x", 6)), tax)
    assert rows(out, "label", "topic_id") == [("cold_start", "knit"), ("in_profile", "knit"),
                                              ("new_interest", "bonsai")]


def test_footprint_known_since_under_min_support():
    """known_since is the time of the interaction that made the topic known; unknown topics have none."""
    fp = build_footprints(log(("u", "k1", 0), ("u", "k2", 10), ("u", "b1", 20)), TAX, LabelConfig(min_support=2))
    got = {r.topic_id: (r.interactions, r.known, r.known_since) for r in fp.itertuples()}
    assert got["knit"] == (2, True, T0 + pd.Timedelta(minutes=10))
    assert got["bonsai"][:2] == (1, False) and pd.isna(got["bonsai"][2])


def test_footprint_forgets_outside_memory():
    """With memory_days, a topic last seen before the window is not known at the end."""
    fp = build_footprints(log(("u", "k1", 0), ("u", "b1", 3 * 24 * 60)), TAX, LabelConfig(memory_days=2))
    got = {r.topic_id: r.known for r in fp.itertuples()}
    assert got == {"knit": False, "bonsai": True}


def test_users_over_max_user_events_are_set_aside_and_counted():
    """max_user_events=2: 'bot' has 3 interactions and gets no labels and no footprint; 'u' keeps
    hers; the summary counts the user and the interactions set aside (duplicates stay separate)."""
    from labeler.labels.plan import plan_labels
    events = log(("bot", "k1", 0), ("bot", "k2", 1), ("bot", "b1", 2), ("u", "k1", 0), ("u", "b1", 5),
                 ("u", "b1", 5))
    run = plan_labels(events, TAX, LabelConfig(max_user_events=2))
    labels = run.labels_frame()
    assert set(labels["user_id"]) == {"u"}
    assert set(run.footprints_frame()["user_id"]) == {"u"}
    counts = run.counts
    assert counts["users_over_max_user_events"] == 1 and counts["interactions_of_those_users"] == 3
    assert counts["duplicate_events_collapsed"] == 1 and counts["interactions_labelled"] == 2

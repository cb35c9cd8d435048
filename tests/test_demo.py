"""The invented demo scenario: deterministic, with the promised size and a consistent ground truth."""
from __future__ import annotations

import pandas as pd
import pytest

from labeler.demo import generate_scenario


def test_same_seed_same_scenario():
    """A seed gives identical tables; another seed gives different ones."""
    a, b = generate_scenario(seed=3, n_items=300, n_users=40, weeks=3), generate_scenario(seed=3, n_items=300,
                                                                                         n_users=40, weeks=3)
    pd.testing.assert_frame_equal(a.interactions, b.interactions)
    pd.testing.assert_frame_equal(a.items, b.items)
    c = generate_scenario(seed=4, n_items=300, n_users=40, weeks=3)
    assert not a.interactions.equals(c.interactions)


def test_default_scenario_size():
    """Defaults: >= 3,000 items in >= 20 themes at two granularities, >= 1,000 users over 12 weeks."""
    s = generate_scenario()
    assert len(s.items) >= 3000 and s.truth_items["theme"].nunique() >= 20 and s.truth_items["hobby"].nunique() >= 5
    assert s.interactions["user_id"].nunique() >= 1000
    span = s.interactions["ts"].max() - s.interactions["ts"].min()
    assert pd.Timedelta(weeks=11) < span <= pd.Timedelta(weeks=12)
    assert set(s.truth_items["kind"]) == {"regular", "mixed", "off_topic"}
    assert set(s.users["kind"]) == {"explorer", "homebody", "churner"}


def test_truth_events_are_interactions():
    """Every true new-interest event is an interaction of the log, on an item of its theme."""
    s = generate_scenario(seed=2, n_items=500, n_users=100, weeks=6)
    merged = s.truth_events.merge(s.interactions, on=["user_id", "item_id", "ts", "event_id"])
    assert len(merged) == len(s.truth_events)
    themes = s.truth_items.set_index("item_id")["theme"]
    assert (s.truth_events["item_id"].map(themes) == s.truth_events["theme"]).all()
    homebodies = set(s.users.loc[s.users["kind"] == "homebody", "user_id"])
    assert not homebodies & set(s.truth_events["user_id"])


@pytest.mark.parametrize("weeks", [1, 2])
def test_very_short_scenarios(weeks):
    """One- and two-week scenarios generate without error."""
    assert len(generate_scenario(seed=1, n_items=200, n_users=50, weeks=weeks).interactions) > 0

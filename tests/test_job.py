"""The scheduled job (`labeler run`): incremental equals full, late data, items over time, bad
partitions, the lock, and crash safety at every failpoint.

Data: the invented demo scenario (small size), cut into daily partitions. "Equal" means the
committed output files (labels by date, footprints, users) are byte-identical.
"""
from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pyarrow.compute as pc
import pyarrow.parquet as pq
import pytest

from labeler import JobConfig, LabelConfig, Taxonomy, TaxonomyConfig, label_interactions
from labeler.errors import EngineError, LockedError, RejectedError
from labeler.job import FAILPOINTS, current_outputs, load_state, run_job
from labeler.job.failpoints import WRITE_POINTS


@pytest.fixture(scope="module")
def scenario():
    from labeler.demo import generate_scenario
    s = generate_scenario(7, n_items=600, n_users=150, weeks=6)
    ev = s.interactions.copy()
    ev["date"] = pd.to_datetime(ev["ts"], utc=True).dt.strftime("%Y-%m-%d")
    ev.loc[ev.index % 9 == 4, "event_type"] = "impression"  # for the event_types setting
    return s.items, ev


def write_days(ev: pd.DataFrame, folder: Path, dates) -> None:
    for d in dates:
        part = folder / f"date={d}"
        part.mkdir(parents=True, exist_ok=True)
        ev[ev["date"] == d].drop(columns="date").to_parquet(part / "part-0.parquet", index=False)


def make_config(root: Path, work: str = "work", **run) -> JobConfig:
    labels = run.pop("labels", {})
    # scan_min_rows = 0: the job's tests run the sorted label pass (labeler/labels/scan.py) on their small logs
    engine = {"memory_limit": "1GB", "threads": 2, "scan_min_rows": 0, **run.pop("engine", {})}
    return JobConfig(items=str(root / "items.parquet"), interactions=str(root / "interactions"),
                     work_dir=str(root / work), labels=labels, engine=engine,
                     run={"taxonomy_from": "categories", **run})


def committed(work: Path) -> dict[str, bytes]:
    gen = current_outputs(work)
    return {str(p.relative_to(gen)): p.read_bytes() for p in sorted(gen.rglob("*.parquet"))}


def assert_same_outputs(a: Path, b: Path) -> None:
    x, y = committed(a), committed(b)
    assert sorted(x) == sorted(y)
    differ = [k for k in x if x[k] != y[k]]
    assert not differ, f"files differ: {differ[:5]}"


def assert_label_files_in_order(work: Path) -> None:
    """Every label file of the current generation holds its rows in the contract's order (the
    engine sorts them; the job writes them as they come when a date has no earlier rows)."""
    from labeler.job.outputs import LABEL_SORT
    for f in sorted((current_outputs(work) / "labels").rglob("*.parquet")):
        t = pq.read_table(f)
        assert t.equals(t.take(pc.sort_indices(t, sort_keys=LABEL_SORT))), f


def store_files(work: Path) -> dict[str, bytes]:
    """Every file of the job's lookup store, with each manifest's publish time left out (it records
    when, which a re-run cannot repeat)."""
    out = {}
    for p in sorted((work / "store").rglob("*")):
        if p.is_file() and not p.name.startswith(".CURRENT"):
            data = p.read_bytes()
            if p.name == "manifest.json":
                data = json.dumps({k: v for k, v in json.loads(data).items() if k != "created"}).encode()
            out[str(p.relative_to(work))] = data
    return out


def setup_root(tmp_path: Path, scenario, upto: int) -> tuple[Path, list[str]]:
    items, ev = scenario
    items.to_parquet(tmp_path / "items.parquet", index=False)
    dates = sorted(ev["date"].unique())
    write_days(ev, tmp_path / "interactions", dates[:upto])
    return tmp_path, dates


CONFIGS = {
    "defaults": {},
    "support2_memory7": {"min_support": 2, "memory_days": 7},
    "engaged_only": {"footprint_from": "engaged", "engaged_min": 0.5},
    "any_new_warmup3": {"multi_topic": "any_new", "warmup": 3},
    "label_from_boost_discovery": {"label_from": "2026-03-20T00:00:00Z", "boost_on": "discovery"},
    "memory3": {"memory_days": 3},
    "support3_memory10_any_new": {"min_support": 3, "memory_days": 10, "multi_topic": "any_new"},
    "warmup4_engaged_boost": {"warmup": 4, "footprint_from": "engaged", "boost_on": "discovery"},
    "label_from_inside_the_new_days": {"label_from": "2026-03-25T12:00:00Z"},
    "event_types_play": {"event_types": ["play"], "min_support": 2},
}


@pytest.mark.parametrize("name", sorted(CONFIGS))
def test_incremental_runs_equal_one_full_run(tmp_path, scenario, name):
    """Three incremental runs write the same bytes as one full run over the same partitions."""
    root, dates = setup_root(tmp_path, scenario, 20)
    _, ev = scenario
    cfg = make_config(root, labels=CONFIGS[name])
    first = run_job(cfg).manifest
    assert first["mode"] == "full" and first["why"] == "first run"
    write_days(ev, root / "interactions", dates[20:30])
    second = run_job(cfg).manifest
    assert second["mode"] == "incremental" and second["status"] == "committed"
    assert second["relabelled_users"] == 0 and second["continued_users"] > 0
    assert second["dates_linked"] > 0 or name == "label_from_inside_the_new_days"  # no rows before it
    write_days(ev, root / "interactions", dates[30:])
    run_job(cfg)
    full = run_job(make_config(root, work="full", labels=CONFIGS[name])).manifest
    assert full["mode"] == "full"
    assert_same_outputs(root / "work", root / "full")
    assert_label_files_in_order(root / "work")


@pytest.mark.parametrize("name", ["defaults", "support3_memory10_any_new", "label_from_inside_the_new_days"])
def test_ten_daily_runs_equal_one_full_run(tmp_path, scenario, name):
    """Ten daily runs, each continued from the state carried at the last watermark (no user
    re-labelled over their history), write the same bytes as one full run."""
    root, dates = setup_root(tmp_path, scenario, 20)
    _, ev = scenario
    cfg = make_config(root, labels=CONFIGS[name])
    run_job(cfg)
    for day in dates[20:30]:
        write_days(ev, root / "interactions", [day])
        m = run_job(cfg).manifest
        assert m["mode"] == "incremental" and m["relabelled_users"] == 0 and m["continued_users"] > 0, m
        assert m["store"]["publish"] == "changed users as delta layers"
    run_job(make_config(root, work="full", labels=CONFIGS[name]))
    assert_same_outputs(root / "work", root / "full")
    assert_same_store_answers(root / "work", root / "full", ev)


@pytest.mark.parametrize("name", ["defaults", "support3_memory10_any_new", "warmup4_engaged_boost",
                                  "label_from_inside_the_new_days"])
def test_a_full_run_in_pieces_writes_the_bytes_of_one_pass(tmp_path, scenario, name):
    """A full run over more than engine.bucket_rows interactions is labelled one range of users at
    a time and the pieces joined: the outputs and the store are the bytes of one pass, and daily
    runs continue from it as from a one-pass run."""
    root, dates = setup_root(tmp_path, scenario, 25)
    _, ev = scenario
    pieces = make_config(root, labels=CONFIGS[name], engine={"bucket_rows": 700})
    one = make_config(root, work="one", labels=CONFIGS[name])
    m = run_job(pieces).manifest
    run_job(one)
    assert m["mode"] == "full" and not list((root / "work" / "outputs").glob(".pieces-*"))
    assert_same_outputs(root / "work", root / "one")
    assert store_files(root / "work") == store_files(root / "one")
    write_days(ev, root / "interactions", dates[25:27])
    assert run_job(pieces).manifest["mode"] == "incremental"
    run_job(one)
    assert_same_outputs(root / "work", root / "one")


def test_zstd_outputs_keep_the_byte_promises(tmp_path, scenario):
    """engine.output_compression = "zstd": a full run in pieces writes the bytes of one pass, daily
    runs continue to the bytes of a full run, and the labels and footprints files are ZSTD-coded with
    the rows of the default (LZ4) files."""
    root, dates = setup_root(tmp_path, scenario, 25)
    _, ev = scenario
    zstd = {"output_compression": "zstd"}
    pieces = make_config(root, engine={"bucket_rows": 700, **zstd})
    run_job(pieces)
    run_job(make_config(root, work="one", engine=zstd))
    assert_same_outputs(root / "work", root / "one")
    write_days(ev, root / "interactions", dates[25:27])
    assert run_job(pieces).manifest["mode"] == "incremental"
    run_job(make_config(root, work="full", engine=zstd))
    run_job(make_config(root, work="lz4"))
    assert_same_outputs(root / "work", root / "full")
    ours, default = current_outputs(root / "work"), current_outputs(root / "lz4")
    for name in ["footprints.parquet", *sorted(str(p.relative_to(ours)) for p in (ours / "labels").rglob("*.parquet"))[:3]]:
        assert pq.ParquetFile(ours / name).metadata.row_group(0).column(0).compression == "ZSTD"
        assert pq.ParquetFile(default / name).metadata.row_group(0).column(0).compression == "LZ4"
        assert pq.read_table(ours / name).equals(pq.read_table(default / name)), name


def assert_same_store_answers(a: Path, b: Path, ev: pd.DataFrame) -> None:
    """Every user's footprint and labels for a sample of items are the same in both jobs' stores."""
    from labeler import open_store
    x, y = open_store(a / "store"), open_store(b / "store")
    items = sorted(set(ev["item_id"]))[::25] + ["no-such-item"]
    for user in sorted(set(ev["user_id"])) + ["no-such-user"]:
        fx, fy = x.footprint(user), y.footprint(user)
        assert (fx.history_len, fx.topics, fx.watermark) == (fy.history_len, fy.topics, fy.watermark), user
        assert x.classify(user, items) == y.classify(user, items), user


def test_a_day_tying_the_watermark_takes_the_exact_path_for_its_users(tmp_path, scenario):
    """Events at the watermark's own timestamp cannot be continued from state (events at one
    instant never see each other, and the carried counts include the watermark's events): their
    users are re-labelled over their whole history, the others continued; equal to a full run."""
    root, dates = setup_root(tmp_path, scenario, 20)
    _, ev = scenario
    cfg = make_config(root, labels={"min_support": 2})
    run_job(cfg)
    watermark = pd.Timestamp(load_state(root / "work")["watermark"])
    write_days(ev, root / "interactions", [dates[20]])
    f = root / "interactions" / f"date={dates[20]}" / "part-0.parquet"
    part = pd.read_parquet(f)
    last = ev[pd.to_datetime(ev["ts"], utc=True) == watermark].iloc[0]
    tie = part.iloc[[0]].assign(user_id=last["user_id"], item_id=part["item_id"].iloc[1], ts=watermark,
                                event_id="tie")
    pd.concat([part, tie], ignore_index=True).to_parquet(f, index=False)
    m = run_job(cfg).manifest
    assert m["relabelled_users"] == 1 and m["continued_users"] > 0
    run_job(make_config(root, work="full", labels={"min_support": 2}))
    assert_same_outputs(root / "work", root / "full")


def test_a_day_of_only_new_users_is_continued_from_empty_state(tmp_path, scenario):
    """Users never seen before start from no carried state: cold_start first, then the rules."""
    root, dates = setup_root(tmp_path, scenario, 20)
    _, ev = scenario
    cfg = make_config(root)
    run_job(cfg)
    day = ev[ev["date"] == dates[20]].assign(user_id=lambda d: "new-" + d["user_id"])
    write_days(day, root / "interactions", [dates[20]])
    m = run_job(cfg).manifest
    assert m["relabelled_users"] == 0 and m["continued_users"] == day["user_id"].nunique()
    labels = pq.read_table(current_outputs(root / "work") / "labels" / f"date={dates[20]}").to_pandas()
    first = labels[labels["user_id"].str.startswith("new-")].groupby("user_id").head(1)
    assert (first["history_len"] == 0).all() and first["label"].isin(["cold_start", "unplaced"]).all()
    whole = ev[ev["date"] < dates[20]]
    write_days(whole, root / "fresh-in", dates[:20])
    write_days(day, root / "fresh-in", [dates[20]])
    run_job(make_config(root, work="full").model_copy(update={"interactions": str(root / "fresh-in")}))
    assert_same_outputs(root / "work", root / "full")


def test_job_labels_are_the_library_labels(tmp_path, scenario):
    """After incremental runs the job's labels are, row for row, what label_interactions gives on
    the whole log with the same taxonomy (the job adds only the per-date labels_version)."""
    root, dates = setup_root(tmp_path, scenario, 25)
    items, ev = scenario
    cfg = make_config(root)
    run_job(cfg)
    write_days(ev, root / "interactions", dates[25:])
    run_job(cfg)
    got = pq.read_table(current_outputs(root / "work") / "labels").to_pandas()
    got = got.sort_values(["user_id", "ts", "event_id", "item_id", "level"], na_position="last").reset_index(drop=True)
    want = label_interactions(ev.drop(columns="date"), Taxonomy.from_categories(items), LabelConfig())
    cols = ["user_id", "item_id", "event_id", "level", "topic_id", "label", "reward_multiplier", "history_len",
            "known_topics"]
    pd.testing.assert_frame_equal(got[cols].astype(object), want[cols].astype(object), check_dtype=False)
    assert (pd.to_datetime(got["ts"]) == pd.to_datetime(want["ts"])).all()


def test_nothing_new_is_a_no_op(tmp_path, scenario):
    root, _ = setup_root(tmp_path, scenario, 10)
    cfg = make_config(root)
    run_job(cfg)
    before = committed(root / "work")
    again = run_job(cfg)
    assert again.manifest["status"] == "up to date" and again.exit_code == 0
    assert committed(root / "work") == before
    third = run_job(cfg)  # every run keeps its own record
    records = sorted(p.parent.name for p in (root / "work" / "runs").glob("*/manifest.json"))
    assert records == ["run-000001", "run-000002", "run-000003"] and third.manifest["run"] == "run-000003"


def test_changed_partition_in_lookback_relabels_its_users_from_the_change(tmp_path, scenario):
    """A partition that changes inside the lookback is re-staged; its users are re-labelled from
    its date on, and the result equals a full run over the changed data."""
    root, dates = setup_root(tmp_path, scenario, 30)
    _, ev = scenario
    cfg = make_config(root, lookback_partitions=3)
    run_job(cfg)
    day = dates[28]
    f = root / "interactions" / f"date={day}" / "part-0.parquet"
    part = pd.read_parquet(f)
    late = part.iloc[[0]].copy()
    late["item_id"] = ev["item_id"].iloc[-1]
    late["event_id"] = "late-1"
    part = pd.concat([part.iloc[2:], late], ignore_index=True)  # two rows gone, one late row added
    part.to_parquet(f, index=False)
    m = run_job(cfg).manifest
    assert m["partitions"][day] == "changed"
    assert m["relabelled_from"] == day
    assert all(d >= day for d in m["dates_rewritten"])
    run_job(make_config(root, work="full"))
    assert_same_outputs(root / "work", root / "full")


def test_change_outside_lookback_is_reported_not_reprocessed(tmp_path, scenario):
    root, dates = setup_root(tmp_path, scenario, 20)
    cfg = make_config(root, lookback_partitions=2)
    run_job(cfg)
    before = committed(root / "work")
    f = root / "interactions" / f"date={dates[3]}" / "part-0.parquet"
    pd.read_parquet(f).iloc[1:].to_parquet(f, index=False)
    m = run_job(cfg).manifest
    assert m["partitions"][dates[3]] == "changed_outside_lookback"
    assert m["status"] == "up to date" and committed(root / "work") == before
    m = run_job(cfg, full=True).manifest  # --full takes it in
    assert m["mode"] == "full" and m["partitions"][dates[3]] == "changed"


def test_late_events_in_a_new_partition_and_the_horizon(tmp_path, scenario):
    """A new partition may hold events from earlier days: within the horizon they are labelled on
    their own date (their users re-labelled from there); beyond it they are quarantined."""
    root, dates = setup_root(tmp_path, scenario, 30)
    _, ev = scenario
    cfg = make_config(root, late_horizon_days=5)
    run_job(cfg)
    new_day = dates[30]
    write_days(ev, root / "interactions", [new_day])
    f = root / "interactions" / f"date={new_day}" / "part-0.parquet"
    part = pd.read_parquet(f)
    start = pd.Timestamp(new_day, tz="UTC")
    within = part.iloc[[0]].assign(ts=start - pd.Timedelta(days=3), event_id="within")
    beyond = part.iloc[[1]].assign(ts=start - pd.Timedelta(days=12), event_id="beyond")
    pd.concat([part, within, beyond], ignore_index=True).to_parquet(f, index=False)
    m = run_job(cfg).manifest
    assert m["quarantined"] == 1
    assert m["relabelled_from"] == (start - pd.Timedelta(days=3)).strftime("%Y-%m-%d")
    quarantine = pd.read_parquet(next((root / "work" / "quarantine").glob(f"{new_day}-*.parquet")))
    assert quarantine["event_id"].tolist() == ["beyond"]
    labels = pq.read_table(current_outputs(root / "work") / "labels").to_pandas()
    assert "within" in set(labels["event_id"]) and "beyond" not in set(labels["event_id"])
    run_job(make_config(root, work="full", late_horizon_days=5))
    assert_same_outputs(root / "work", root / "full")


def _label_rows(work: Path, event_ids) -> pd.DataFrame:
    labels = pq.read_table(current_outputs(work) / "labels").to_pandas()
    return labels[labels["event_id"].isin(event_ids)].sort_values("event_id")


@pytest.mark.parametrize("backfill", [False, True])
def test_items_first_seen_after_their_interactions(tmp_path, scenario, backfill):
    """An item missing from the snapshot leaves its interactions unplaced; when it appears, later
    interactions use its topic, and earlier ones too only with backfill_late_items."""
    root, dates = setup_root(tmp_path, scenario, 20)
    items, ev = scenario
    extra = items.iloc[[0]].assign(item_id="late-item")
    f = root / "interactions" / f"date={dates[5]}" / "part-0.parquet"
    part = pd.read_parquet(f)
    early = part.iloc[[0]].assign(item_id="late-item", event_id="early")
    pd.concat([part, early], ignore_index=True).to_parquet(f, index=False)
    cfg = make_config(root, backfill_late_items=backfill, lookback_partitions=1)
    run_job(cfg)
    assert _label_rows(root / "work", ["early"])["label"].eq("unplaced").all()
    pd.concat([items, extra], ignore_index=True).to_parquet(root / "items.parquet", index=False)
    write_days(ev, root / "interactions", [dates[20]])
    g = root / "interactions" / f"date={dates[20]}" / "part-0.parquet"
    part = pd.read_parquet(g)
    later = part.iloc[[0]].assign(item_id="late-item", event_id="later")
    pd.concat([part, later], ignore_index=True).to_parquet(g, index=False)
    m = run_job(cfg).manifest
    assert m["items"]["new"] == 1
    assert m["policy"]["backfill_late_items"] is backfill
    rows = _label_rows(root / "work", ["early", "later"])
    assert rows.loc[rows["event_id"] == "later", "label"].ne("unplaced").all()
    early_labels = rows.loc[rows["event_id"] == "early", "label"]
    assert early_labels.ne("unplaced").all() if backfill else early_labels.eq("unplaced").all()
    run_job(cfg, full=True)  # a full recompute keeps when the item was first seen
    assert _label_rows(root / "work", ["early", "later"])["label"].tolist() == rows["label"].tolist()


def test_changed_item_text_takes_effect_from_the_change(tmp_path, scenario):
    """An item whose text (here: category) changes keeps its old topic for interactions up to the
    watermark of the run that saw the change, and gets the new one after."""
    root, dates = setup_root(tmp_path, scenario, 20)
    items, ev = scenario
    cfg = make_config(root)
    run_job(cfg)
    cut = pd.Timestamp(load_state(root / "work")["watermark"])
    both = set(ev.loc[ev["date"] < dates[20], "item_id"]) & set(ev.loc[ev["date"] >= dates[20], "item_id"])
    item = sorted(both)[0]
    old_cat = items.loc[items["item_id"] == item, "category"].iloc[0]
    new_cat = next(c for c in sorted(items["category"].dropna().unique()) if c != old_cat and "|" not in c)
    changed = items.copy()
    changed.loc[changed["item_id"] == item, "category"] = new_cat
    changed.to_parquet(root / "items.parquet", index=False)
    write_days(ev, root / "interactions", dates[20:])
    m = run_job(cfg).manifest
    assert m["items"]["changed"] == 1
    labels = pq.read_table(current_outputs(root / "work") / "labels").to_pandas()
    on_item = labels[labels["item_id"] == item]
    def topics(its):
        it = Taxonomy.from_categories(its).item_topics
        return set(it.loc[it["item_id"] == item, "topic_id"])
    ts = pd.to_datetime(on_item["ts"])
    assert set(on_item.loc[ts <= cut, "topic_id"]) <= topics(items)
    assert set(on_item.loc[ts > cut, "topic_id"]) == topics(changed)
    before = committed(root / "work")
    run_job(cfg, full=True)  # a full recompute keeps the as-of assignments: same bytes
    assert committed(root / "work") == before


def _corrupt(path: Path) -> None:
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])


def test_bad_partition_is_skipped_by_path_and_retried(tmp_path, scenario):
    root, dates = setup_root(tmp_path, scenario, 12)
    bad = root / "interactions" / f"date={dates[7]}" / "part-0.parquet"
    good_bytes = bad.read_bytes()
    _corrupt(bad)
    cfg = make_config(root)
    res = run_job(cfg)
    assert res.exit_code == 1 and res.manifest["status"] == "committed"
    assert str(bad) in res.manifest["rejected"][dates[7]]
    assert dates[7] not in load_state(root / "work")["partitions"]
    bad.write_bytes(good_bytes)
    res = run_job(cfg)
    assert res.exit_code == 0 and res.manifest["partitions"][dates[7]] == "new"
    run_job(make_config(root, work="full"))
    assert_same_outputs(root / "work", root / "full")


def test_a_run_that_only_rejected_a_partition_says_so(tmp_path, scenario):
    """A run whose one new partition is rejected commits nothing, exits 1 and is not 'up to date'."""
    root, dates = setup_root(tmp_path, scenario, 10)
    cfg = make_config(root)
    run_job(cfg)
    write_days(scenario[1], root / "interactions", [dates[10]])
    _corrupt(root / "interactions" / f"date={dates[10]}" / "part-0.parquet")
    res = run_job(cfg)
    assert res.exit_code == 1 and res.manifest["status"] == "nothing committed: 1 partition(s) rejected"


def test_a_dst_gap_or_a_schema_mismatch_rejects_only_that_partition(tmp_path, scenario):
    """With on_bad_partition = "skip", a partition with a naive time in a DST gap and one whose
    files disagree on their schema are rejected by path; the other new partitions are committed."""
    from labeler.config import InputConfig
    root, dates = setup_root(tmp_path, scenario, 10)
    cfg = make_config(root).model_copy(update={"input": InputConfig(timezone="Europe/Lisbon")})
    run_job(cfg)
    write_days(scenario[1], root / "interactions", dates[10:12])
    gap = root / "interactions" / "date=2026-03-29"
    gap.mkdir()
    (gap / "part-0.csv").write_text("user_id,item_id,ts\nu0001,v00001,2026-03-29T01:30:00\n")
    mixed = root / "interactions" / f"date={dates[11]}"
    pd.read_parquet(mixed / "part-0.parquet").head(3).astype({"ts": str}).to_parquet(mixed / "part-1.parquet")
    res = run_job(cfg)
    assert res.exit_code == 1 and res.manifest["status"] == "committed"
    assert set(res.manifest["rejected"]) == {"2026-03-29", dates[11]}
    assert "daylight-saving" in res.manifest["rejected"]["2026-03-29"]
    assert "part-1.parquet" in res.manifest["rejected"][dates[11]] and "schema differs" in res.manifest["rejected"][dates[11]]
    assert res.manifest["partitions"][dates[10]] == "new"


def test_bad_partition_stops_the_run_when_configured(tmp_path, scenario):
    root, dates = setup_root(tmp_path, scenario, 12)
    cfg = make_config(root, on_bad_partition="stop")
    run_job(cfg)
    state = (root / "work" / "state.json").read_bytes()
    write_days(scenario[1], root / "interactions", dates[12:14])
    _corrupt(root / "interactions" / f"date={dates[13]}" / "part-0.parquet")
    with pytest.raises(RejectedError, match=dates[13]):
        run_job(cfg)
    assert (root / "work" / "state.json").read_bytes() == state


def test_a_second_run_is_refused_while_the_lock_is_held(tmp_path, scenario, cli):
    root, _ = setup_root(tmp_path, scenario, 5)
    toml = _toml(root)
    holder = subprocess.Popen([sys.executable, "-c", (
        "import sys, time; from labeler.job import RunLock\n"
        f"with RunLock({str(root / 'work')!r}):\n    print('held', flush=True); time.sleep(60)")],
        stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout.readline().strip() == "held"
        code, out, err = cli("run", "--config", toml, "-q")
        assert code == LockedError.exit_code == 3
        assert "another run holds the lock" in err and f"pid {holder.pid}" in err
    finally:
        holder.kill()
        holder.wait()
    code, out, err = cli("run", "--config", toml, "-q")  # the holder died: its lock is taken over
    assert code == 0, err
    m = json.loads(next((root / "work" / "runs").glob("*/manifest.json")).read_text())
    assert m["lock_taken_over"]["pid"] == holder.pid


def _toml(root: Path, work: str = "work") -> Path:
    p = root / f"{work}.toml"
    p.write_text(f'items = "items.parquet"\ninteractions = "interactions"\nwork_dir = "{work}"\n'
                 '[run]\ntaxonomy_from = "categories"\n[engine]\nmemory_limit = "1GB"\nthreads = 2\n'
                 'scan_min_rows = 0\n')
    return p


def _run_cli(toml: Path, env_extra: dict | None = None) -> subprocess.CompletedProcess:
    env = {**os.environ, **(env_extra or {})}
    return subprocess.run([sys.executable, "-c", "import sys; from labeler.cli import main; "
                           f"sys.exit(main(['run', '--config', {str(toml)!r}, '-q']))"],
                          env=env, capture_output=True, text=True, timeout=300)


@pytest.fixture(scope="module")
def crash_reference(tmp_path_factory, scenario):
    """A clean two-run history every crash test must end up equal to."""
    root = tmp_path_factory.mktemp("clean")
    root, dates = setup_root(root, scenario, 25)
    assert _run_cli(_toml(root)).returncode == 0
    write_days(scenario[1], root / "interactions", dates[25:])
    assert _run_cli(_toml(root)).returncode == 0
    return root, dates


@pytest.mark.parametrize("point", FAILPOINTS)
def test_killed_at_any_point_a_rerun_gives_the_clean_outputs(tmp_path, scenario, crash_reference, point):
    """SIGKILL at each failpoint of the second run; re-running gives the clean run's bytes: outputs,
    and every file of the lookup store, manifests included (but for their publish time)."""
    ref, dates = crash_reference
    root, _ = setup_root(tmp_path, scenario, 25)
    toml = _toml(root)
    assert _run_cli(toml).returncode == 0
    write_days(scenario[1], root / "interactions", dates[25:])
    killed = _run_cli(toml, {"LABELER_FAILPOINT": point})
    assert killed.returncode == -9, killed.stderr[-2000:]
    again = _run_cli(toml)
    assert again.returncode == 0, again.stderr[-2000:]
    assert_same_outputs(root / "work", ref / "work")
    assert store_files(root / "work") == store_files(ref / "work")  # manifests included, but for `created`
    state, ref_state = load_state(root / "work"), load_state(ref / "work")
    for key in ("watermark", "partitions", "register", "taxonomy", "generation", "store_snapshot"):
        if key == "partitions":
            assert {k: {**v, "files": None} for k, v in state[key].items()} == \
                {k: {**v, "files": None} for k, v in ref_state[key].items()}
        else:
            assert state[key] == ref_state[key], key


@pytest.mark.parametrize("point", WRITE_POINTS)
def test_disk_full_leaves_the_previous_state_intact(tmp_path, scenario, monkeypatch, point):
    root, dates = setup_root(tmp_path, scenario, 15)
    cfg = make_config(root)
    run_job(cfg)
    state = (root / "work" / "state.json").read_bytes()
    store_current = (root / "work" / "store" / "CURRENT").read_bytes()
    before = committed(root / "work")
    write_days(scenario[1], root / "interactions", dates[15:20])
    monkeypatch.setenv("LABELER_FAILPOINT", f"enospc@{point}")
    with pytest.raises(EngineError, match="disk full"):
        run_job(cfg)
    assert (root / "work" / "state.json").read_bytes() == state
    assert committed(root / "work") == before
    if point != "write_state":  # the store is published just before the state
        assert (root / "work" / "store" / "CURRENT").read_bytes() == store_current
    monkeypatch.delenv("LABELER_FAILPOINT")
    assert run_job(cfg).manifest["status"] == "committed"
    store = root / "work" / "store"
    current = json.loads((store / "snapshots" / (store / "CURRENT").read_text().strip() / "manifest.json").read_text())
    assert current["sequence"] == 2  # a publish done before the failed state write is not redone
    run_job(make_config(root, work="full"))
    assert_same_outputs(root / "work", root / "full")


def test_cli_run_prints_a_summary_and_logs_json_lines(tmp_path, scenario, cli):
    root, _ = setup_root(tmp_path, scenario, 8)
    code, out, err = cli("run", "--config", _toml(root), "--log-format", "json")
    assert code == 0, err
    assert "committed (full: first run)" in out and "manifest:" in out
    lines = [json.loads(line) for line in err.splitlines() if line.startswith("{")]
    assert lines and all({"time", "level", "logger", "message"} <= set(r) for r in lines)


def test_a_damaged_lock_file_is_taken_over_and_a_folder_is_refused(tmp_path, scenario, cli):
    """A lock file holding random bytes is an unknown dead holder (taken over); a folder in its place
    is refused with exit 2 and a message saying to remove it."""
    root, _ = setup_root(tmp_path, scenario, 5)
    (root / "work").mkdir()
    (root / "work" / "run.lock").write_bytes(bytes(range(256)) * 4)
    code, _, err = cli("run", "--config", _toml(root), "-q")
    assert code == 0, err
    (root / "work" / "run.lock").unlink()
    (root / "work" / "run.lock").mkdir()
    code, _, err = cli("run", "--config", _toml(root), "-q")
    assert code == 2 and "it is a folder" in err and "Remove" in err and "Traceback" not in err, err


def test_cli_run_needs_a_config(cli):
    code, _, err = cli("run")
    assert code == 2 and "--config" in err


def test_demo_job_config_points_at_the_demo_output(fixtures):
    from labeler import load_job_config
    cfg = load_job_config(fixtures / "demo-job.toml", environ={})
    root = fixtures.parent
    assert Path(cfg.items) == (root / "demo-out" / "data" / "items.parquet").resolve()
    assert Path(cfg.interactions) == (root / "demo-out" / "data" / "daily").resolve()
    assert Path(cfg.work_dir).is_relative_to((root / "demo-out").resolve())


@pytest.mark.parametrize("passes", [True, False])
def test_rebuild_taxonomy_switches_only_when_the_gate_passes(tmp_path, scenario, passes):
    """--rebuild-taxonomy builds a candidate, runs the rollout check, and switches (recomputing in
    full under the new taxonomy) only when the gate passes; otherwise it keeps the current one."""
    root, dates = setup_root(tmp_path, scenario, 20)
    items, _ = scenario
    cfg = make_config(root)
    run_job(cfg)
    before = load_state(root / "work")
    edited = items.copy()  # an editorial change: one category folded into another
    cats = sorted(c for c in edited["category"].dropna().unique() if "|" not in c)
    edited.loc[edited["category"] == cats[0], "category"] = cats[1]
    edited.to_parquet(root / "items.parquet", index=False)
    gate = {"max_flip_share": 1.0, "min_ami": 0.0, "max_unplaced_share": 1.0, "max_retired_share": 1.0,
            "min_topic_size": 1} if passes else {"max_flip_share": 0.0}
    cfg = cfg.model_copy(update={"gate": cfg.gate.model_validate(gate)})
    m = run_job(cfg, rebuild_taxonomy=True).manifest
    refresh = m["taxonomy_refresh"]
    assert refresh["checked"] and refresh["passed"] is passes and refresh["switched"] is passes
    assert (root / "work" / "runs" / m["run"] / "rollout-check" / "summary.json").exists()
    after = load_state(root / "work")
    if passes:
        assert m["mode"] == "full" and after["taxonomy"]["version"] == refresh["candidate"]
        labels = pq.read_table(current_outputs(root / "work") / "labels").to_pandas()
        assert set(labels["taxonomy_version"]) == {refresh["candidate"]}
        run_job(make_config(root, work="fresh"))  # a fresh job on the edited items: same outputs
        assert_same_outputs(root / "work", root / "fresh")
    else:
        assert "flip_share" in refresh["reason"]
        assert after["taxonomy"] == before["taxonomy"]


def test_max_user_events_makes_every_run_full_and_says_why(tmp_path, scenario):
    """A user crossing max_user_events loses every earlier label: the job cannot be incremental
    with that setting, recomputes in full, and the manifest says so; it still equals a fresh run."""
    root, dates = setup_root(tmp_path, scenario, 20)
    cfg = make_config(root, labels={"max_user_events": 60})
    run_job(cfg)
    write_days(scenario[1], root / "interactions", dates[20:])
    m = run_job(cfg).manifest
    assert m["mode"] == "full" and "max_user_events" in m["why"]
    run_job(make_config(root, work="fresh", labels={"max_user_events": 60}))
    assert_same_outputs(root / "work", root / "fresh")


@pytest.mark.model
def test_a_job_on_a_distilled_taxonomy_places_new_items_with_its_table(tmp_path, scenario):
    """taxonomy.encoder = distilled in the job (real packaged model): the first run distils and builds
    the taxonomy from text; a later day's new item (another item's text under a new id) is placed by
    the taxonomy's own table in that item's fine topic, and the incremental outputs equal a full run's."""
    from external import cache_dir
    root, dates = setup_root(tmp_path, scenario, 10)
    items, ev = scenario
    cfg = make_config(root, taxonomy_from="text").model_copy(update={"taxonomy": TaxonomyConfig(
        encoder="distilled", distill_items=200, embedding_cache=str(cache_dir() / "embeddings"))})
    run_job(cfg)
    twin = items.iloc[[3]].assign(item_id="twin-item")
    pd.concat([items, twin], ignore_index=True).to_parquet(root / "items.parquet", index=False)
    write_days(ev, root / "interactions", [dates[10]])
    g = root / "interactions" / f"date={dates[10]}" / "part-0.parquet"
    part = pd.read_parquet(g)
    pd.concat([part, part.iloc[[0]].assign(item_id="twin-item", event_id="twin")], ignore_index=True).to_parquet(g, index=False)
    m = run_job(cfg).manifest
    assert m["items"]["new"] == 1 and m["items"]["placed"] == 1
    labels = pq.read_table(current_outputs(root / "work") / "labels").to_pandas()
    fine = labels[labels["level"] == 1].set_index("event_id")["topic_id"]
    original = labels[(labels["level"] == 1) & (labels["item_id"] == items["item_id"].iloc[3])]["topic_id"]
    assert len(original) and fine["twin"] == original.iloc[0]
    incremental = committed(root / "work")
    run_job(cfg, full=True)
    assert committed(root / "work") == incremental

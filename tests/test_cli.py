"""The command line: help for every verb, exit codes, and the README's demo command."""
from __future__ import annotations

import hashlib
import json

import pytest

from labeler.cli import build_parser

VERBS = [["demo"], ["taxonomy"], ["taxonomy", "build"], ["taxonomy", "assign"], ["label"], ["run"], ["rollout-check"], ["evaluate"]]


def test_top_level_help_lists_every_verb(cli):
    """`labeler --help` prints usage naming each verb."""
    code, out, _ = cli("--help")
    assert code == 0
    for verb in ("demo", "taxonomy", "label"):
        assert verb in out


@pytest.mark.parametrize("verb", VERBS, ids=" ".join)
def test_each_verb_has_help(cli, verb):
    """Each verb's --help prints its usage and exits 0."""
    code, out, _ = cli(*verb, "--help")
    assert code == 0 and "usage: labeler " + " ".join(verb) in out


def test_every_option_has_help_text():
    """No option is left without a help string."""
    parser = build_parser()
    stack = [parser]
    while stack:
        p = stack.pop()
        for action in p._actions:
            if action.choices and isinstance(action.choices, dict):
                stack.extend(action.choices.values())
            elif action.option_strings and action.dest not in ("help", "version"):
                assert action.help, f"{p.prog} {action.option_strings} has no help"


def test_unknown_flag_is_a_usage_error(cli):
    """A misspelled flag exits with 2."""
    code, _, err = cli("label", "--taxnomy", "x")
    assert code == 2 and "unrecognized arguments" in err or "required" in err


def test_taxonomy_and_label_on_fixtures(cli, fixtures, tmp_path):
    """Editorial taxonomy then labels on the fixtures: exit 0, outputs written, summary counts duplicates."""
    code, out, err = cli("taxonomy", "build", "--items", fixtures / "items.csv", "--out", tmp_path / "tax",
                         "--from-categories", "category", "-q")
    assert code == 0, err
    code, out, err = cli("label", "--taxonomy", tmp_path / "tax", "--interactions",
                         fixtures / "interactions.csv", "--out", tmp_path / "out", "-q")
    assert code == 0, err
    summary = json.loads((tmp_path / "out" / "summary.json").read_text())
    assert summary["input"]["duplicate_events_collapsed"] == 1
    assert summary["input"]["interactions_on_items_without_topics"] == 1
    assert (tmp_path / "out" / "footprints.parquet").exists()
    assert sorted(p.name for p in (tmp_path / "out" / "labels").iterdir())[0] == "date=2026-03-02"
    assert "new_interest rate by week" in out


def test_label_with_event_types_from_config(cli, fixtures, tmp_path):
    """labels.event_types from the config drops the other event types and reports the count."""
    cli("taxonomy", "build", "--items", fixtures / "items.csv", "--out", tmp_path / "tax",
        "--from-categories", "category", "-q")
    cfg = tmp_path / "job.toml"
    cfg.write_text('[labels]\nevent_types = ["play"]\n')
    code, _, err = cli("label", "--taxonomy", tmp_path / "tax", "--interactions", fixtures / "interactions.csv",
                       "--out", tmp_path / "out", "--config", cfg, "-q")
    assert code == 0, err
    summary = json.loads((tmp_path / "out" / "summary.json").read_text())
    assert summary["input"]["dropped_event_type"] == 1


def test_learned_taxonomy_build_and_assign(cli, fixtures, tmp_path):
    """`taxonomy build --embedder hashing` then `taxonomy assign` write their outputs."""
    code, out, err = cli("taxonomy", "build", "--items", fixtures / "items.csv", "--out", tmp_path / "tax",
                         "--embedder", "hashing", "-q")
    assert code == 0, err and "taxonomy" in out
    code, out, err = cli("taxonomy", "assign", "--taxonomy", tmp_path / "tax", "--items", fixtures / "items.csv",
                         "--out", tmp_path / "placed.csv", "-q")
    assert code == 0, err
    assert (tmp_path / "placed.csv").read_text().startswith("item_id,level,topic_id,confidence")


def test_label_outputs_byte_identical_across_runs(cli, fixtures, tmp_path):
    """Two runs on the same inputs write byte-identical label files."""
    cli("taxonomy", "build", "--items", fixtures / "items.csv", "--out", tmp_path / "tax",
        "--from-categories", "category", "-q")
    for name in ("a", "b"):
        assert cli("label", "--taxonomy", tmp_path / "tax", "--interactions", fixtures / "interactions.csv",
                   "--out", tmp_path / name, "-q")[0] == 0
    files = sorted(p.relative_to(tmp_path / "a") for p in (tmp_path / "a").rglob("*.parquet"))
    assert files
    for f in files:
        assert (tmp_path / "a" / f).read_bytes() == (tmp_path / "b" / f).read_bytes(), f


def test_demo_small_runs_every_stage(cli, tmp_path):
    """`labeler demo --small --embedder hashing` exits 0 and writes data, taxonomy, labels and a summary."""
    code, out, err = cli("demo", "--out", tmp_path / "d", "--small", "--embedder", "hashing", "-q")
    assert code == 0, err
    for p in ("data/items.parquet", "data/interactions.parquet", "data/truth_events.parquet",
              "taxonomy/manifest.json", "labels/summary.json", "demo-summary.json", "job/state.json"):
        assert (tmp_path / "d" / p).exists(), p
    assert "labelled new_interest at level 1" in out
    assert "fast encoder: skipped (the distilled encoder is fitted from the sentence model" in out
    labels = json.loads((tmp_path / "d" / "labels" / "summary.json").read_text())
    key = hashlib.sha256(f"{labels['taxonomy_version']}\x00{labels['labels_version']}".encode()).hexdigest()
    assert f"store snapshot snap-000001-{key[:8]} " in out  # named by what it holds: the same demo, the same name
    job = json.loads((tmp_path / "d" / "demo-summary.json").read_text())["job"]
    assert [r["mode"] for r in job["runs"]] == ["full", "incremental"]
    assert job["labels_equal_batch_labels"] is True
    plans = json.loads((tmp_path / "d" / "demo-summary.json").read_text())["labels"]["plans"]
    assert plans["scan"]["same_labels"] and plans["windows"]["same_labels"]  # labeler/labels/scan.py equals the windows
    assert "both equal the labels written: yes" in out
    assert plans["pieces"]["same_files"] and plans["pieces"]["pieces"] > 1  # pieces write one pass's bytes
    assert "pieces of users" in out and "the same files as one pass: yes" in out
    evaluation = json.loads((tmp_path / "d" / "demo-summary.json").read_text())["evaluation"]
    assert set(evaluation["policies"]) == {"popularity", "in_profile", "explore_mix"}
    assert evaluation["expected_order_holds"] is True
    assert (tmp_path / "d" / "evaluation" / "report.html").exists()
    line = next(x for x in out.splitlines() if "try it: labeler evaluate" in x)  # the printed command runs
    args = line.split("try it: labeler ", 1)[1].split()
    code, _, err = cli(*args)
    assert code == 0, err
    assert (tmp_path / "d" / "evaluation-cli" / "report.html").exists()


def test_readme_configuration_example_is_a_valid_job_file():
    """The TOML block under README 'Configuration' validates as a JobConfig."""
    import tomllib
    from pathlib import Path
    from labeler.config import JobConfig, validate_config
    text = (Path(__file__).resolve().parent.parent / "README.md").read_text()
    block = text.split("## Configuration", 1)[1].split("```toml\n", 1)[1].split("```", 1)[0]
    cfg = validate_config(JobConfig, tomllib.loads(block))
    assert cfg.run.lookback_partitions == 3 and cfg.engine.shuffle_partitions == 64


def test_a_mistyped_environment_override_names_the_variable():
    """LABELER__LABELS__MIN_SUPORT (a typo) and a bad value are refused naming the variable."""
    from labeler import load_job_config
    from labeler.errors import ConfigError
    with pytest.raises(ConfigError, match=r"unknown key 'labels.min_suport' \(from environment variable "
                                          r"LABELER__LABELS__MIN_SUPORT\)"):
        load_job_config(environ={"LABELER__LABELS__MIN_SUPORT": "2"})
    with pytest.raises(ConfigError, match=r"'labels.min_support'.*\(from environment variable LABELER__LABELS__MIN_SUPPORT\)"):
        load_job_config(environ={"LABELER__LABELS__MIN_SUPPORT": "zero"})


def test_progress_bars_only_on_a_terminal(cli, fixtures, tmp_path):
    """Redirected (as under a scheduler), taxonomy build draws no progress bar on stderr."""
    code, _, err = cli("taxonomy", "build", "--items", fixtures / "items.csv", "--out", tmp_path / "tax",
                       "--embedder", "hashing")
    assert code == 0, err
    assert "it/s" not in err and "\r" not in err


def test_json_log_times_carry_their_zone():
    """`labeler run --log-format json` writes ISO 8601 times with the UTC offset."""
    import json
    import logging
    from labeler.cli._run import _JsonLines
    line = _JsonLines().format(logging.LogRecord("labeler", logging.INFO, __file__, 1, "hello", None, None))
    assert json.loads(line)["time"].endswith("+00:00")


def _labelled(cli, fixtures, tmp_path):
    cli("taxonomy", "build", "--items", fixtures / "items.csv", "--out", tmp_path / "tax", "--from-categories",
        "category", "-q")
    code, _, err = cli("label", "--taxonomy", tmp_path / "tax", "--interactions", fixtures / "interactions.csv",
                       "--out", tmp_path / "out", "--store", tmp_path / "store", "-q")
    assert code == 0, err


def test_disk_full_under_label_out_is_a_clean_error(cli, fixtures, tmp_path, monkeypatch):
    """A full disk while `labeler label` writes: exit 1, 'disk full', no traceback, outputs as before."""
    import errno
    import pyarrow.parquet as pq
    _labelled(cli, fixtures, tmp_path)
    before = {p.name: p.read_bytes() for p in (tmp_path / "out").iterdir() if p.is_file()}

    def full(*a, **k):
        raise OSError(errno.ENOSPC, "No space left on device", str(tmp_path / "out" / "x"))
    monkeypatch.setattr(pq, "write_table", full)
    code, _, err = cli("label", "--taxonomy", tmp_path / "tax", "--interactions", fixtures / "interactions.csv",
                       "--out", tmp_path / "out", "-q")
    assert code == 1 and "disk full" in err and "Traceback" not in err, err
    assert {p.name: p.read_bytes() for p in (tmp_path / "out").iterdir() if p.is_file()} == before
    assert not list((tmp_path / "out").glob(".tmp-*"))  # nothing half-written left behind


def test_disk_full_during_the_store_publish_keeps_the_snapshot(cli, fixtures, tmp_path, monkeypatch):
    """SQLite's 'database or disk is full' during a publish: exit 1, the previous snapshot still served."""
    import sqlite3
    import labeler.store.publish as publish
    _labelled(cli, fixtures, tmp_path)
    current = (tmp_path / "store" / "CURRENT").read_text()

    def full(*a, **k):
        raise sqlite3.OperationalError("database or disk is full")
    monkeypatch.setattr(publish, "_write_shard", full)
    import pandas as pd
    pd.read_csv(fixtures / "interactions.csv").iloc[1:].to_csv(tmp_path / "fewer.csv", index=False)  # shards change
    code, _, err = cli("label", "--taxonomy", tmp_path / "tax", "--interactions", tmp_path / "fewer.csv",
                       "--out", tmp_path / "out2", "--store", tmp_path / "store", "-q")
    assert code == 1 and "disk full while writing the store" in err and "Traceback" not in err, err
    assert (tmp_path / "store" / "CURRENT").read_text() == current

"""`labeler run`: one scheduled, incremental, crash-safe pass of the whole pipeline.

A run, under the work folder's lock:

1. items: the first run builds the taxonomy; later runs place new and changed items into it,
   valid from just after the last watermark (the item register);
2. partitions: new ones are staged, the last ``lookback_partitions`` are re-hashed and staged
   again when changed, bad ones are rejected by path;
3. the users those changes touch are re-labelled over their whole history (labels are a
   per-user computation, so this equals a full run), and only their rows, from the earliest
   changed date on, are rewritten into a new output generation;
4. the lookup store is published, the run manifest written, and last of all the state file,
   atomically: a crash anywhere before that leaves the previous state, and the next run redoes
   the same work and writes the same bytes.
"""
from __future__ import annotations

import dataclasses
import datetime as dt
import functools
import hashlib
import json
import logging
import os
import shutil
import threading
import time
import uuid
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from ..config import JobConfig
from ..engines import make_engine, quiet
from ..errors import ConfigError, EngineError, InputError, RejectedError
from ..labels.files import FOOTPRINTS_SCHEMA
from ..labels.intake import Staged as StagedInput
from ..labels.intake import parquet_rows
from ..labels.plan import Carried, plan_labels
from ..tables import normalize_items, read_table
from ..taxonomy import Taxonomy, build_taxonomy
from ..version import __version__
from . import failpoints
from .lock import RunLock
from .outputs import USERS_SCHEMA, GenerationWriter, age_footprints, write_table
from .partitions import DAY_US, Staged, discover, stage
from .register import first_register, read_register, register_hash_by_day, taxonomy_view, text_hashes, update_register
from .state import STATE_FORMAT, load_state, write_json

log = logging.getLogger(__name__)


@dataclasses.dataclass
class JobResult:
    manifest: dict[str, Any]
    manifest_path: Path
    exit_code: int


def run_job(config: JobConfig, *, full: bool = False, rebuild_taxonomy: bool = False, embedder=None,
            progress: bool = False) -> JobResult:
    """Run the scheduled job once (see the module docstring); returns the run manifest.

    ``full`` recomputes everything from the staged partitions; ``embedder`` overrides the
    taxonomy's embedding model (tests use the hashing embedder).
    """
    if not config.items or not config.interactions:
        raise ConfigError("the job needs 'items' (an items table) and 'interactions' (a folder of date "
                          "partitions) in its TOML file. See fixtures/demo-job.toml.")
    work = Path(config.work_dir)
    work.mkdir(parents=True, exist_ok=True)
    with RunLock(work) as lock:
        failpoints.hit("after_lock")
        try:
            return _Run(config, work, full, rebuild_taxonomy, embedder, progress, lock).go()
        except OSError as exc:
            import errno
            if exc.errno == errno.ENOSPC:
                raise EngineError(f"{work}: disk full while writing ({exc.strerror}). Nothing was committed: "
                                  "the previous state and outputs are intact. Free space and run again.") from None
            raise


@dataclasses.dataclass
class DateVersions:
    """labels_version of an output date (see ``_Run._versions``); picklable, for engines that write
    a generation's dates on their workers."""

    days: np.ndarray
    reg_hashes: list[str]
    head: str
    spans: list[tuple[int, str, str]]

    def __call__(self, date: str) -> str:
        end = _day_start(date) + DAY_US
        k = int(np.searchsorted(self.days, end, side="left")) - 1
        reg = self.reg_hashes[k] if k >= 0 else "none"
        inputs = ",".join(f"{n}:{h}" for lo, n, h in sorted(self.spans, key=lambda s: s[1]) if lo < end)
        return hashlib.sha256(f"{self.head}\x00{reg}\x00{inputs}".encode()).hexdigest()


def _table(batches, schema: pa.Schema) -> pa.Table:
    """Record batches (in order) as one table of ``schema``."""
    return pa.concat_tables([pa.Table.from_batches([b]).cast(schema) for b in batches] or [schema.empty_table()])


class PublishBeside:
    """A store publish that runs beside the writing of the outputs: started in a thread as soon as
    the changed rows are known (``start``), it writes its files while the outputs are written, and
    switches the store only once they are (``finish``). If they fail (``abandon``), the store stays
    as it was. The publish's Python inserts and the outputs' Arrow and Parquet work share the two
    cores: on the daily benchmark the store stage's seconds mostly disappear into the outputs'."""

    def __init__(self, publish):
        """``publish(footprint_rows, history_rows, before_switch)`` -> the snapshot's name."""
        self.publish, self.future = publish, None
        self.pool = ThreadPoolExecutor(max_workers=1, thread_name_prefix="store")
        self.written, self.ok = threading.Event(), False

    def start(self, footprint_rows: pa.Table, history_rows: pa.Table) -> None:
        self.future = self.pool.submit(self.publish, footprint_rows, history_rows, self._gate)

    def _gate(self) -> None:
        self.written.wait()
        if not self.ok:
            raise RuntimeError("the outputs were not written: the store snapshot is not switched to")

    def finish(self) -> str:
        if self.future is None:
            raise RuntimeError("the store publish was never started: the changed rows never came")
        self.ok = True
        self.written.set()
        try:
            return self.future.result()
        finally:
            self.pool.shutdown()

    def abandon(self) -> None:
        self.written.set()
        self.pool.shutdown(wait=True)  # its own error (it was not switched to) is the outputs' one's echo


def _day(us: int) -> str:
    return pd.Timestamp(us, unit="us", tz="UTC").strftime("%Y-%m-%d")


def _day_start(date: str) -> int:
    return int(pd.Timestamp(date, tz="UTC").value // 1000)


class _Run:
    def __init__(self, config: JobConfig, work: Path, full: bool, rebuild: bool, embedder, progress: bool, lock):
        self.cfg, self.work, self.embedder, self.progress = config, work, embedder, progress
        self.full_requested, self.rebuild = full, rebuild
        self.lock = lock
        self.timings: dict[str, float] = {}
        self.started = dt.datetime.now(dt.timezone.utc)

    def _timed(self, stage: str, t0: float) -> None:
        self.timings[stage] = round(time.perf_counter() - t0, 3)

    # -- the run --------------------------------------------------------------------------------
    def go(self) -> JobResult:
        cfg, work = self.cfg, self.work
        state = load_state(work)
        seq = (state["run"] + 1) if state else 1  # committed runs: numbers the output generations
        run_id = f"run-{_next_run_number(work, state):06d}"  # every run, committed or not, has its own record
        mode, why = self._mode(state)
        if mode == "full" and state is not None:
            log.info("full recompute: %s", why)

        t0 = time.perf_counter()
        tax, register, changes = self._items(state, mode)
        self.refresh = self._refresh_due(changes)
        if state is not None and (self.rebuild or self.refresh["due"]):
            switched = self._try_refresh(tax, register, changes, state, run_id)
            if switched is not None:
                tax, register = switched
                mode, why = "full", "taxonomy switched after the rollout gate passed"
        self._timed("items", t0)
        failpoints.hit("after_items")

        t0 = time.perf_counter()
        parts, statuses, rejected, ignored, affected_old = self._partitions(state, mode)
        self._timed("staging", t0)
        failpoints.hit("after_staging")

        reg_changed = state is None or mode == "full" or changes["added_rows"] > 0
        staged_new = [n for n, st in statuses.items() if st in ("new", "changed")]
        removed = [n for n, st in statuses.items() if st == "removed"]
        manifest = {"run": run_id, "mode": mode, "why": why, "started": self.started.isoformat(),
                    "tool_version": __version__, "config_hash": hashlib.sha256(
                        cfg.canonical_json().encode()).hexdigest(),
                    "policy": {"lookback_partitions": cfg.run.lookback_partitions,
                               "late_horizon_days": cfg.run.late_horizon_days,
                               "on_bad_partition": cfg.run.on_bad_partition,
                               "backfill_late_items": cfg.run.backfill_late_items,
                               "late_items": "backfilled from their earliest interaction"
                               if cfg.run.backfill_late_items else "unplaced before they were first seen"},
                    "inputs": {"items": cfg.items, "interactions": cfg.interactions,
                               "partitions_seen": len(parts) + len(rejected), "ignored_entries": ignored},
                    "partitions": statuses, "rejected": rejected,
                    "items": {k: v for k, v in changes.items() if k != "first_seen"},
                    "lock_taken_over": self.lock.took_over, "taxonomy_refresh": self.refresh}
        if not staged_new and not removed and not reg_changed:
            manifest.update(status=f"nothing committed: {len(rejected)} partition(s) rejected" if rejected
                            else "up to date", watermark=state and state.get("watermark"),
                            generation=state and state.get("generation"))
            return self._finish(run_id, manifest, state, rejected, commit=False)

        # who and what to re-label
        watermark_us = max((p.max_ts_us for p in parts.values() if p.max_ts_us is not None), default=None)
        if watermark_us is None:
            raise InputError("no interactions accepted in any partition; nothing to label.",
                             source=cfg.interactions, hint="Check the partitions and the rejected list.")
        prev_gen = (work / "outputs" / state["generation"]) if (state and mode == "incremental") else None
        continued: list[str] = []
        if mode == "incremental":
            users, continued, start_us = self._affected(parts, staged_new, affected_old, changes, state)
        else:
            users, start_us = None, min(p.min_ts_us for p in parts.values() if p.min_ts_us is not None)
        start_date = _day(start_us) if start_us is not None else None
        versions = self._versions(tax, register, parts)

        t0 = time.perf_counter()
        eng = make_engine(cfg.engine)
        view = taxonomy_view(tax, register)
        as_of = pd.Timestamp(watermark_us, unit="us", tz="UTC")
        gen_name = f"gen-{seq:06d}"
        lab = cfg.labels
        self._aged = functools.partial(age_footprints, watermark_us=watermark_us, min_support=lab.min_support,
                                       memory_us=lab.memory_us)
        files = [str(work / p.events) for _, p in sorted(parts.items()) if p.rows]
        limit = getattr(eng.config, "bucket_rows", None)
        total = sum(p.rows for p in parts.values())
        from ..store import publish_store
        from ..store.publish import publishes_layered
        # what this publish holds follows from these alone, so a re-run after a crash that came after
        # the publish finds it already done and leaves the store as a clean run would
        content_key = hashlib.sha256(json.dumps(
            {"after": state and state.get("store_snapshot"), "mode": mode, "generation": gen_name,
             "partitions": {n: {k: v for k, v in p.to_json().items() if k != "files"}  # content, not paths
                            for n, p in sorted(parts.items())}, "taxonomy": tax.version,
             "register": self.register_rel, "labels": json.loads(lab.canonical_json()),
             "shards": cfg.run.store_shards, "tool": __version__}, sort_keys=True, default=str).encode()).hexdigest()
        people, beside = None, None
        continued_ids = pa.array(continued, pa.string())

        def publish(fp_rows, user_rows, partial=None, before_switch=None) -> str:
            return publish_store(work / "store", fp_rows, view, lab, history=user_rows, as_of=as_of,
                                 shards=cfg.run.store_shards, retain=cfg.run.keep_generations,
                                 changed_users=people,
                                 content_key=content_key, partial_users=partial, before_switch=before_switch)

        def publish_changed(fp_rows, user_rows, before_switch) -> str:
            # delta layers: the changed users only, and of a continued user only the topics met since
            # the last watermark (their other rows are as published; lookups age them)
            if continued:
                stale = pc.and_(pc.is_in(fp_rows.column("user_id"), value_set=continued_ids),
                                pc.less_equal(pc.cast(fp_rows.column("last_ts"), pa.int64()), state["watermark_us"]))
                fp_rows = fp_rows.filter(pc.invert(stale))
            return publish(fp_rows, user_rows, partial=continued_ids, before_switch=before_switch)

        if mode == "full" and limit is not None and total > limit and not hasattr(eng, "write_partitioned"):
            writer = self._full_in_pieces(eng, view, files, as_of, work / "outputs" / gen_name, versions,
                                          tax.version, limit, total)
            linked = 0
        else:
            user_array = pa.array(users, pa.string()) if users is not None else None
            runs = []
            if user_array is None or len(user_array) or not continued:  # whole histories: all, or the exact-path users
                runs.append(plan_labels(self._staged(eng, files, user_array), view, lab, engine=eng,
                                        as_of=as_of).materialize())
            if continued:  # the day's events only, continued from the state carried at the last watermark
                new_files = [str(work / parts[n].events) for n in staged_new if parts[n].rows]
                carried = Carried(prev_gen / "footprints.parquet", prev_gen / "users.parquet", state["watermark_us"],
                                  continued_ids)
                runs.append(plan_labels(self._staged(eng, new_files, continued_ids), view, lab, engine=eng, as_of=as_of,
                                        carried=carried).materialize())
            self._timed("labels", t0)
            failpoints.hit("after_labels")

            t0 = time.perf_counter()
            people = None if user_array is None else pa.concat_arrays([user_array, continued_ids])
            writer = GenerationWriter(work / "outputs" / gen_name, prev_gen, user_array, start_date, versions,
                                      tax.version, people=people, compression=cfg.engine.output_compression)
            if people is not None and publishes_layered(work / "store", cfg.run.store_shards, view, lab):
                beside = PublishBeside(publish_changed)
            try:
                linked = self._write_generation(writer, runs, start_us, streamed=prev_gen is None and len(runs) == 1,
                                                continued=continued_ids,
                                                on_new_rows=beside and beside.start)
            except BaseException:
                if beside is not None:
                    beside.abandon()
                raise
            self._timed("outputs", t0)
        failpoints.hit("after_outputs")

        t0 = time.perf_counter()
        if beside is not None:  # publishing since the changed rows were known: switch, now the outputs are written
            snapshot = beside.finish()
        else:
            snapshot = publish(writer.gen / "footprints.parquet", writer.gen / "users.parquet")
        self._timed("store", t0)
        failpoints.hit("after_store")

        counts: dict[str, dict[str, int]] = {}
        for (level, label), n in sorted(writer.counts.items()):
            counts.setdefault(str(level), {})[label] = n
        manifest.update(
            status="committed", generation=gen_name, watermark=pd.Timestamp(
                watermark_us, unit="us", tz="UTC").isoformat(),
            relabelled_users="all" if users is None else len(users), continued_users=len(continued),
            relabelled_from=start_date, rows_in=int(sum(parts[n].rows for n in staged_new if n in parts)),
            quarantined=int(sum(parts[n].quarantined for n in staged_new if n in parts)),
            rows_out=counts, label_rows_written=writer.rows_written,
            dates_rewritten=writer.dates_written, dates_linked=linked,
            footprint_rows=writer.footprint_rows, users=writer.user_rows,
            versions={"taxonomy": tax.version, "labels_by_date": {
                d: versions(d) for d in writer.dates_written}},
            store={"dir": str(work / "store"), "snapshot": snapshot, "publish": _store_manifest(work, snapshot)["publish"]})
        new_state = {"format": STATE_FORMAT, "run": seq, "last_run": run_id, "generation": gen_name,
                     "watermark": manifest["watermark"], "watermark_us": watermark_us,
                     "taxonomy": {"version": tax.version, "dir": f"taxonomy/{tax.version[:16]}"},
                     "register": self.register_rel, "labels_config": json.loads(lab.canonical_json()),
                     "input_config": json.loads(cfg.input.canonical_json()), "tool_version": __version__,
                     "partitions": {n: p.to_json() for n, p in sorted(parts.items())},
                     "store_snapshot": snapshot}
        return self._finish(run_id, manifest, new_state, rejected, commit=True)

    def _finish(self, run_id, manifest, state, rejected, commit: bool) -> JobResult:
        manifest["durations_s"] = self.timings
        manifest["finished"] = dt.datetime.now(dt.timezone.utc).isoformat()
        path = self.work / "runs" / run_id / "manifest.json"
        write_json(path, manifest)
        if commit:
            write_json(self.work / "state.json", state, point="state")
            failpoints.hit("after_state")
            self._clean(state)
        code = 1 if rejected else 0
        log.info("run %s %s (exit %d); manifest %s", run_id, manifest["status"], code, path)
        return JobResult(manifest, path, code)

    # -- decisions ------------------------------------------------------------------------------
    def _mode(self, state) -> tuple[str, str]:
        if state is None:
            return "full", "first run"
        if self.full_requested:
            return "full", "requested with --full"
        if state.get("labels_config") != json.loads(self.cfg.labels.canonical_json()):
            return "full", "label settings changed since the last run"
        if state.get("input_config") != json.loads(self.cfg.input.canonical_json()):
            return "full", "input settings changed since the last run"
        if self.cfg.labels.max_user_events is not None:
            return "full", ("labels.max_user_events is set: a user crossing the limit loses every earlier "
                            "label, so each run recomputes in full")
        if state.get("tool_version") != __version__:
            return "full", f"tool version changed ({state.get('tool_version')} -> {__version__})"
        if not (self.work / "outputs" / state["generation"]).is_dir():
            return "full", f"previous output generation {state['generation']} is missing"
        return "incremental", "new or changed partitions only"

    def _refresh_due(self, changes) -> dict:
        share, limit = changes["unplaced_share"], self.cfg.run.refresh_unplaced_share
        due = (changes["placed"] + changes["unplaced"]) > 0 and share > limit
        out = {"due": bool(due), "new_items_unplaced_share": share, "threshold": limit}
        if due:
            log.warning("%.0f%% of new items fell below min_confidence (threshold %.0f%%): a taxonomy "
                        "refresh is due (run with --rebuild-taxonomy)", 100 * share, 100 * limit)
        return out

    def _try_refresh(self, tax, register, changes, state, run_id):
        """Build a candidate taxonomy (stable ids from the current one), check it against the
        current one on the staged interactions, and return (candidate, register) if the gate
        passes; otherwise keep the current taxonomy and record why."""
        from ..rollout.check import check_rollout, check_value
        cfg = self.cfg
        items, hashes, category = self._items_now
        if category is not None:
            candidate = Taxonomy.from_categories(items, column=category)
        else:
            candidate = build_taxonomy(items, cfg.taxonomy, embedder=self.embedder, previous=tax,
                                       progress=self.progress, source=cfg.items)
        self.refresh["requested"] = bool(self.rebuild)
        self.refresh["candidate"] = candidate.version
        if candidate.version == tax.version:
            self.refresh.update(checked=False, switched=False, reason="the candidate equals the current taxonomy")
            return None
        files = [str(self.work / p["events"]) for p in state["partitions"].values() if p["rows"]]
        eng = make_engine(cfg.engine)
        staged = StagedInput(eng.read_parquet(files), source="staged interactions",
                             rows=sum(p["rows"] for p in state["partitions"].values()), content_hash="job")
        result = check_rollout(taxonomy_view(tax, register), candidate, staged, cfg.gate, label_config=cfg.labels,
                               engine=eng)
        out = result.write(self.work / "runs" / run_id / "rollout-check")
        failed = [k for k, c in result.summary["gate"]["checks"].items() if not c["passed"]]
        self.refresh.update(checked=True, passed=result.passed, report=str(out), failed_checks=failed)
        if not result.passed:
            self.refresh.update(switched=False, reason="rollout gate failed: " + ", ".join(
                f"{k}={check_value(result.summary['gate']['checks'][k])} "
                f"(needs {result.summary['gate']['checks'][k]['threshold']})" for k in failed))
            log.warning("taxonomy refresh: candidate %s kept out, %s", candidate.version[:12], self.refresh["reason"])
            return None
        self._save_taxonomy(candidate)
        new_register = first_register(candidate, items, hashes)
        self.register_rel = self._save_register(new_register)
        self.refresh.update(switched=True, reason="rollout gate passed")
        log.info("taxonomy refresh: switched to %s; labels and footprints are recomputed in full", candidate.version[:12])
        return candidate, new_register

    # -- items ----------------------------------------------------------------------------------
    def _items(self, state, mode):
        cfg = self.cfg
        raw = read_table(Path(cfg.items))
        category = cfg.run.category_column if cfg.run.taxonomy_from == "categories" else None
        items, _ = normalize_items(raw, text_columns=cfg.taxonomy.text_columns, source=cfg.items, category=category)
        hashes = text_hashes(items, cfg.taxonomy.text_columns, category)
        self._items_now = (items, hashes, category)
        changes = {"new": 0, "changed": 0, "placed": 0, "unplaced": 0, "unplaced_share": 0.0, "added_rows": 0}
        if state is None:
            if category is not None:
                tax = Taxonomy.from_categories(items, column=category)
            else:
                tax = build_taxonomy(items, cfg.taxonomy, embedder=self.embedder, progress=self.progress,
                                     source=cfg.items)
            self._save_taxonomy(tax)
            register = first_register(tax, items, hashes)
            changes.update(new=int(len(items)), placed=int(tax.item_topics["item_id"].nunique()))
        else:
            tax_dir = self.work / state["taxonomy"]["dir"]
            tax = Taxonomy.load(tax_dir)
            previous = read_register(self.work / state["register"])
            first_seen = self._first_seen(state, previous, items) if cfg.run.backfill_late_items else None
            register, ch = update_register(previous, tax, items, hashes, state["watermark_us"] + 1,
                                           first_seen, embedder=self.embedder)
            changes.update(new=len(ch.new), changed=len(ch.changed), placed=ch.placed, unplaced=ch.unplaced,
                           unplaced_share=ch.unplaced_share, added_rows=int(len(register) - len(previous)),
                           first_seen=first_seen or {})
        self.register_rel = self._save_register(register)
        return tax, register, changes

    def _first_seen(self, state, register, items) -> dict[str, int]:
        """Earliest interaction on each item the register has not seen (for backfilling)."""
        new = sorted(set(items["item_id"]) - set(register["item_id"]))
        files = [str(self.work / p["events"]) for p in state["partitions"].values() if p["rows"]]
        if not new or not files:
            return {}
        import duckdb
        con = quiet(duckdb.connect())
        con.register("new_items", pa.table({"item_id": new}))
        rows = con.execute("SELECT item_id, min(epoch_us(ts)) FROM read_parquet(?) WHERE item_id IN "
                           "(SELECT item_id FROM new_items) GROUP BY item_id", [files]).fetchall()
        return {i: int(us) for i, us in rows}

    def _save_taxonomy(self, tax: Taxonomy) -> None:
        dest = self.work / "taxonomy" / tax.version[:16]
        if dest.exists():
            return
        tmp = dest.with_name(f".{dest.name}.{uuid.uuid4().hex}")
        tax.save(tmp)
        os.replace(tmp, dest)

    def _save_register(self, register: pd.DataFrame) -> str:
        # names the register's file by its content: pandas' 64-bit hash of each row, in order (a
        # tenth of the time of hashing its CSV text, which every run paid)
        rows = pd.util.hash_pandas_object(register, index=False).to_numpy()
        digest = hashlib.sha256(repr(list(register.columns)).encode() + rows.tobytes()).hexdigest()
        rel = f"items/register-{digest[:16]}.parquet"
        if not (self.work / rel).exists():
            table = pa.Table.from_pandas(register, preserve_index=False).replace_schema_metadata(None)
            write_table(table, self.work / rel, "write_register")
        return rel

    # -- partitions -----------------------------------------------------------------------------
    def _partitions(self, state, mode):
        cfg, work = self.cfg, self.work
        found, ignored = discover(Path(cfg.interactions))
        known = {n: Staged(**p) for n, p in (state or {}).get("partitions", {}).items()}
        lookback = set(sorted(known)[-cfg.run.lookback_partitions:]) if cfg.run.lookback_partitions else set()
        forgotten = _tombstones(work / "store")
        parts, statuses, rejected, affected_old = {}, {}, {}, []
        for part in found:
            old = known.get(part.name)
            if old is not None and mode == "incremental" and part.name not in lookback:
                statuses[part.name] = "unchanged"
                parts[part.name] = old
                if part.stat_key() != old.files:  # touched: hashed to tell a real change
                    if part.content_hash() != old.hash:
                        statuses[part.name] = "changed_outside_lookback"
                        log.warning("%s changed but is older than the last %d partitions: not re-processed "
                                    "(run with --full to take it in)", part.path, cfg.run.lookback_partitions)
                    else:
                        parts[part.name] = dataclasses.replace(old, files=part.stat_key())
                continue
            h = part.content_hash()
            if old is not None and old.hash == h and (work / old.events).exists():
                parts[part.name] = dataclasses.replace(old, files=part.stat_key())
                statuses[part.name] = "unchanged"
                continue
            try:
                parts[part.name] = stage(part, h, work, cfg.input, cfg.run.late_horizon_days, forgotten)
            except InputError as exc:
                rejected[part.name] = str(exc)
                log.error("rejected partition %s: %s", part.path, exc)
                if cfg.run.on_bad_partition == "stop":
                    raise RejectedError(f"partition {part.path} was rejected and run.on_bad_partition = 'stop': "
                                        f"nothing was committed. {exc}") from None
                if old is not None:  # keep what was accepted before; retried next run
                    parts[part.name] = old
                continue
            statuses[part.name] = "new" if old is None else "changed"
            if old is not None:
                affected_old.append(old)
            log.info("staged partition %s: %d events (%d quarantined)", part.name, parts[part.name].rows,
                     parts[part.name].quarantined)
        for name, old in known.items():
            if name not in parts and name not in rejected and name not in {p.name for p in found}:
                statuses[name] = "removed"
                affected_old.append(old)
                log.warning("partition %s disappeared from %s; its users are re-labelled without it", name,
                            cfg.interactions)
        return parts, statuses, rejected, ignored, affected_old

    def _affected(self, parts, staged_new, affected_old, changes, state):
        """Users to re-label over their whole history, users to continue from the carried state,
        and the earliest time whose labels can change.

        A user is continued when every event of theirs in the new partitions is later than the
        last watermark and nothing earlier of theirs changed; users of changed or removed
        partitions, of events at or before the watermark, and of late items take the exact path.
        """
        watermark = state["watermark_us"]
        new_files = [str(self.work / parts[n].events) for n in staged_new if parts[n].rows]
        old_files = [str(self.work / p.events) for p in affected_old if p.rows and (self.work / p.events).exists()]
        starts = [parts[n].min_ts_us for n in staged_new if parts[n].min_ts_us is not None]
        starts += [p.min_ts_us for p in affected_old if p.min_ts_us is not None]
        exact: set[str] = set()
        day_users = pa.array([], pa.string())
        import duckdb
        con = quiet(duckdb.connect())
        if new_files:  # as Arrow, sorted by DuckDB: the day's users are many (Python tuples cost 0.3 s a million)
            firsts = con.sql("SELECT user_id, min(epoch_us(ts)) <= ? AS early FROM read_parquet(?) GROUP BY user_id "
                             "ORDER BY user_id", params=[watermark, new_files]).to_arrow_table()
            early = firsts.column("early")
            exact |= set(firsts.column("user_id").filter(early).to_pylist())
            day_users = firsts.column("user_id").filter(pc.invert(early))
        if old_files:
            exact |= {r[0] for r in con.execute("SELECT DISTINCT user_id FROM read_parquet(?)", [old_files]).fetchall()}
        first_seen = changes.get("first_seen") or {}
        if first_seen:
            all_files = [str(self.work / p.events) for p in parts.values() if p.rows]
            con.register("late_items", pa.table({"item_id": sorted(first_seen)}))
            got = con.execute("SELECT DISTINCT user_id FROM read_parquet(?) WHERE item_id IN "
                              "(SELECT item_id FROM late_items)", [all_files]).fetchall()
            exact |= {r[0] for r in got}
            starts.append(min(first_seen.values()))
        if changes["added_rows"]:
            starts.append(watermark + 1)
        if exact and len(day_users):
            day_users = day_users.filter(pc.invert(pc.is_in(day_users, value_set=pa.array(sorted(exact), pa.string()))))
        return sorted(exact), day_users.to_pylist(), (min(starts) if starts else None)

    def _write_generation(self, writer: GenerationWriter, runs: list, start_us: int | None, streamed: bool,
                          continued: pa.Array | None = None, on_new_rows=None) -> int:
        """The labels of ``runs`` from ``start_us``'s day on, their footprints and histories, into ``writer``
        (``streamed``: one full run, whose footprints come from the engine in key order; ``continued``:
        users continued from carried state; ``on_new_rows(footprints, history)``: called with the
        changed rows once they are known, before anything is written).
        Returns the number of previous dates linked unchanged."""
        linked = writer.link_unchanged()
        if not streamed:
            # the changed rows only (bounded by the day: of a continued user, the topics the day
            # touched): read here, from files a distributed engine's workers wrote, to merge into
            # the previous generation's files in one pass; handed to ``on_new_rows`` first, so the
            # store can publish them while the labels and those files are written
            fp = pa.concat_tables([_table(r.footprint_batches(touched_only=True), FOOTPRINTS_SCHEMA) for r in runs])
            history = pa.concat_tables([_table(r.history_batches(), USERS_SCHEMA) for r in runs])
            if on_new_rows is not None:
                on_new_rows(fp, history)
        t = runs[0].labels if len(runs) == 1 else runs[0].labels.union(runs[1].labels, distinct=False)
        t = t.filter(t.ts_us >= (start_us // DAY_US) * DAY_US) if start_us is not None else t
        writer.write_stream(runs[0].engine, t.mutate(_date=t.ts.date().cast("string")).drop("ts_us"))
        writer.finish_dates()
        if streamed:
            writer.write_people(runs[0].footprint_batches(), runs[0].history_batches(), self._aged)
        else:
            for r in runs:  # the engine's cached tables are done with: their memory goes before the merge's
                r.release()
            writer.write_people(fp, history, self._aged, continued=continued)
        return linked

    def _full_in_pieces(self, eng, view, files, as_of, gen: Path, versions, tax_version, limit: int,
                        total: int) -> GenerationWriter:
        """A full run over more than ``engine.bucket_rows`` interactions: label one range of users at
        a time (each piece in memory), write each piece as a generation of its own, then join them
        in user order into ``gen``: the same bytes as one pass, with memory bounded by the piece."""
        from tqdm import tqdm
        from ..labels.pieces import cut_users, rows_in
        ev = eng.read_parquet(files)
        ranges = cut_users(eng, ev, total, limit)
        log.info("full run of %d interactions in %d pieces of about %d", total, len(ranges), limit)
        scratch = gen.with_name(f".pieces-{gen.name}")
        shutil.rmtree(scratch, ignore_errors=True)
        # one pass cuts the staged events into the pieces' files: each piece reads its own rows only
        scattered = eng.scatter(ev, "user_id", [p.hi for p in ranges[:-1]], scratch / "input")
        pieces: list[GenerationWriter] = []
        spent = {"labels": 0.0, "outputs": 0.0}
        bar = tqdm(total=total, unit=" interactions", unit_scale=True, disable=not self.progress,
                   desc="labelling in pieces")
        for k in range(len(ranges)):
            t0 = time.perf_counter()
            piece_rows = rows_in(scattered[k])
            sel = eng.read_parquet(scattered[k])
            run = plan_labels(StagedInput(sel, source=self.cfg.interactions, rows=piece_rows, content_hash="job"), view,
                              self.cfg.labels, engine=eng, as_of=as_of).materialize()
            t1 = time.perf_counter()
            piece = GenerationWriter(scratch / f"{k:06d}", None, None, None, versions, tax_version,
                                     compression=self.cfg.engine.output_compression)
            self._write_generation(piece, [run], None, streamed=True)
            run.release()
            shutil.rmtree(scratch / "input" / f"_piece={k}")
            pieces.append(piece)
            spent["labels"] += t1 - t0
            spent["outputs"] += time.perf_counter() - t1
            bar.update(piece_rows)
            bar.set_postfix_str(f"piece {k + 1}/{len(ranges)}")
        bar.close()
        self.timings["labels"] = round(spent["labels"], 3)
        failpoints.hit("after_labels")
        t0 = time.perf_counter()
        writer = GenerationWriter(gen, None, None, None, versions, tax_version,
                                  compression=self.cfg.engine.output_compression)
        writer.join(pieces)
        shutil.rmtree(scratch)
        self.timings["outputs"] = round(spent["outputs"] + time.perf_counter() - t0, 3)
        return writer

    def _staged(self, eng, files: list[str], users: pa.Array | None) -> StagedInput:
        """Staged events of ``files`` as an engine table, cut to ``users`` when given."""
        ev = eng.read_parquet(files)
        if users is not None:
            ev = ev.filter(ev.user_id.isin(eng.table(pa.table({"user_id": users}), "users").user_id))
        # the row count chooses DuckDB's label plan (labeler.labels.scan: the sorted pass from engine.scan_min_rows
        # on); other engines have one plan, so they are spared the count
        rows = 0
        if eng.name == "duckdb":
            rows = parquet_rows(files) if users is None else \
                int(eng.to_pandas(ev.aggregate(n=ev.count()))["n"].iloc[0])
        return StagedInput(ev, source=self.cfg.interactions, rows=rows, content_hash="job")

    def _versions(self, tax, register, parts):
        """labels_version of each output date: the taxonomy, the label settings, the tool, and the
        inputs those labels can depend on (partitions with events before the date's end, register
        rows valid before it). Equal for incremental and full runs over the same inputs."""
        days, reg_hashes = self._register_days(register)
        head = "\x00".join([tax.version, self.cfg.labels.canonical_json(), __version__])
        spans = sorted((p.min_ts_us, n, p.hash) for n, p in parts.items() if p.rows and p.min_ts_us is not None)
        return DateVersions(days, list(reg_hashes), head, spans)

    def _register_days(self, register: pd.DataFrame) -> tuple[np.ndarray, list[str]]:
        """``register_hash_by_day`` of the register, kept beside its file (which its content names):
        hashing every row costs 0.3 s a run for 100k items, and the register rarely changes."""
        cache = self.work / f"{self.register_rel.removesuffix('.parquet')}.days.json"
        try:
            got = json.loads(cache.read_text())
            if got["tool"] == __version__:
                return np.array(got["days"], dtype=np.int64), got["hashes"]
        except (OSError, ValueError, KeyError, TypeError):
            pass  # none yet, or unreadable: computed again
        days, hashes = register_hash_by_day(register)
        tmp = cache.with_name(f".{cache.name}.{uuid.uuid4().hex}")
        tmp.write_text(json.dumps({"tool": __version__, "days": days.tolist(), "hashes": list(hashes)}))
        os.replace(tmp, cache)
        return days, list(hashes)

    # -- cleaning -------------------------------------------------------------------------------
    def _clean(self, state) -> None:
        """Drop generations beyond the retention count and files no state refers to."""
        keep = self.cfg.run.keep_generations
        gens = sorted(p.name for p in (self.work / "outputs").iterdir() if p.name.startswith("gen-"))
        current = state["generation"]
        for name in gens:
            if name > current or name in gens[-keep:]:
                continue
            shutil.rmtree(self.work / "outputs" / name, ignore_errors=True)
        referenced = {p["events"] for p in state["partitions"].values()}
        for folder in ("events", "quarantine"):
            d = self.work / folder
            if not d.is_dir():
                continue
            for f in d.iterdir():
                rel = f"events/{f.name}"
                if rel not in referenced:
                    f.unlink(missing_ok=True)
        reg = self.work / "items"
        keep_days = f"items/{state['register'].removesuffix('.parquet')}.days.json"
        for f in [*reg.glob("register-*.parquet"), *reg.glob("register-*.days.json")]:
            if f"items/{f.name}" not in (state["register"], keep_days):
                f.unlink(missing_ok=True)


def _next_run_number(work: Path, state: dict | None) -> int:
    """One more than every run that left a record (a run that crashed before its record reuses its number)."""
    runs = work / "runs"
    done = [int(p.name[4:]) for p in runs.glob("run-*") if p.name[4:].isdigit() and (p / "manifest.json").exists()] \
        if runs.is_dir() else []
    return max(done + [state["run"] if state else 0]) + 1


def _store_manifest(work: Path, snapshot: str) -> dict:
    from ..store.layout import read_manifest
    return read_manifest(work / "store", snapshot)


def _tombstones(store: Path) -> set[str]:
    from ..store.layout import tombstones
    return tombstones(store) if store.exists() else set()

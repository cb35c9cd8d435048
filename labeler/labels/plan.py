"""Running the label rules: the public ``label_interactions`` / ``build_footprints`` and the run summary.

A :class:`LabelRun` plans the expressions of :mod:`labeler.labels.rules` on one engine once, so the
CLI and the job get labels, footprints and the summary from one pass over the inputs.
"""
from __future__ import annotations

import dataclasses
import functools
import hashlib
import json
import logging
import os
import shutil
import uuid
from pathlib import Path
from typing import Any

import ibis
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from ..config import InputConfig, LabelConfig
from ..engines import Engine, make_engine, sums_digest
from ..tables import LABEL_VALUES, Intake
from ..version import __version__
from .files import CONTENT_COLUMNS, LABELS_SCHEMA, SORT_KEYS, finish_footprints, finish_labels, \
    output_compression, write_by_date, write_whole
from .intake import interactions_table, item_topics_table
from .pieces import write_in_pieces
from .rules import INTERACTION_COLUMNS, carried_rows, continue_history, continued_history, each_interaction_once, \
    footprint_rows, heavy_users, known_transitions, label_rows, prepare, topic_rows, touched_carried, user_history, \
    with_carried, with_known_topics, with_support
from .scan import applies as scan_applies
from .scan import scanned_rows

log = logging.getLogger(__name__)

@dataclasses.dataclass
class Carried:
    """State carried at a watermark, to label only events after it (the job's daily path).

    ``footprints`` and ``users`` are the footprints and per-user history tables of a run whose
    watermark was ``watermark_us`` (as Parquet paths, Arrow tables or engine tables), with the same
    taxonomy and label settings; ``user_ids`` limits them to the users being continued. Every event
    labelled from this state must be later than ``watermark_us``: events at or before it need the
    user's whole history.
    """

    footprints: Any
    users: Any
    watermark_us: int
    user_ids: Any = None

    def tables(self, engine: Engine):
        """(footprints with known_since_us, users) as engine tables, cut to ``user_ids``."""
        def load(x, prefix):
            if isinstance(x, (str, os.PathLike)):
                return engine.read_parquet(x)
            return engine.table(x, prefix) if isinstance(x, (pa.Table, pd.DataFrame)) else x
        fp, users = load(self.footprints, "carried_fp"), load(self.users, "carried_users")
        if self.user_ids is not None:
            ids = engine.table(pa.table({"user_id": pa.array(self.user_ids, pa.string())}), "continued")
            fp, users = fp.semi_join(ids, "user_id"), users.semi_join(ids, "user_id")
        fp = fp.mutate(known_since_us=engine.epoch_us(fp.known_since.cast(ibis.dtype("timestamp('UTC', 6)"))))
        return fp, users.select("user_id", users.history_len.cast("int64"))


@dataclasses.dataclass
class LabelRun:
    """Planned label and footprint expressions over one engine, with what intake reported.

    Nothing runs until a result is asked for; intake counts are computed once, on first use.
    The topic rows (``base``) are computed once into an engine table the first time anything
    but the labels query reads them (``base``, ``transitions``, footprints, counts, writing):
    asking for labels alone is one query.
    """

    engine: Engine
    config: LabelConfig
    taxonomy_version: str
    labels_version: str
    _labels: Any           # Ibis table: labels with ts_us, unsorted (None: by the scan plan, on first use)
    _base: Any             # Ibis table: one row per (interaction, level, item topic); see ``base``
    _transitions: Any      # Ibis table: when topics become known / forgotten; see ``transitions``
    ev: Any                # Ibis table: the validated input
    intake: Intake
    as_of: Any = None
    materialized: bool = False
    heavy: Any = None      # Ibis table: users set aside by max_user_events (None: no limit)
    single_topic: bool = False
    base_shared: bool = False
    carried: Any = None    # (footprints, users) engine tables and the watermark, when continuing
    carried_until_us: int | None = None
    taxonomy: Any = None   # what the plan labels with (pieces of a bucketed write plan with it again)
    written: dict | None = None  # after a write in pieces: the footprints file and history it wrote
    _with_all_carried: Any = None  # with carried state: the topic rows plus stand-ins of every carried topic
    _new_rows: Any = None  # with carried state: the new events' topic rows, cached
    _touched_carried: Any = None  # with carried state, no memory: the carried rows of the topics they name, cached
    scan: bool = False     # labels by the sort-and-scan plan (labeler.labels.scan)
    _raw_rows: Any = None  # for the scan plan: the topic rows before the duplicate collapse
    _scanned: Any = None   # for the scan plan: where its labels are held (scan.Scanned)

    @property
    def labels(self):
        """Ibis table: labels with ts_us, unsorted."""
        if self._labels is None:
            self._labels = self._scan_labels()
        return self._labels

    @labels.setter
    def labels(self, value) -> None:
        self._labels = value

    def _scan_labels(self, hold: bool = False):
        """The labels by one sorted pass (:mod:`labeler.labels.scan`), labelled chunk by chunk as the pass
        goes: over the topic rows as they came when nothing has read them yet and they hold no
        duplicate interaction, else over the collapsed (shared) ones."""
        until = self.carried_until_us
        label = _chunk_labels(self.engine, self.config, self.single_topic, until)
        scanned = None
        if not self.base_shared and self._raw_rows is not None:
            scanned = scanned_rows(self.engine, self._raw_rows, self.config, label, hold)
            if scanned is None:
                log.info("the interactions hold duplicate events: collapsing them before labelling")
        if scanned is None:
            scanned = scanned_rows(self.engine, self.base, self.config, label, hold)
        if scanned is None:  # cannot happen after the collapse; the windows are the rules' reference
            return _label_expr(self.base, self.transitions, self.config, self.single_topic,
                               _topic_bound(self.taxonomy), until)
        self._scanned = scanned
        return scanned.table

    def share_base(self) -> "LabelRun":
        """Compute the topic rows once into an engine table, for results that read them again."""
        if not self.base_shared:
            self._base = self._base.cache()
            self._transitions = known_transitions(self._base, self.config)
            if not self.scan:  # the scan plan's labels, if computed already, stay valid
                self.labels = _label_expr(self._base, self._transitions, self.config, self.single_topic,
                                      _topic_bound(self.taxonomy), self.carried_until_us)
            self.base_shared = True
        return self

    @property
    def base(self):
        """Ibis table: the topic rows, shared (computed once) from the first read on."""
        return self.share_base()._base

    @property
    def transitions(self):
        """Ibis table: (user_id, level, topic_id, p, d), when topics become known or forgotten."""
        return self.share_base()._transitions

    @functools.cached_property
    def counts(self) -> dict[str, int]:
        return _intake_counts(self.engine, self.ev, self.base, self.config, self.intake, self.heavy)

    @property
    def as_of_us(self) -> int | None:
        if self.as_of is None:
            if self.written is not None:
                return self.written["as_of_us"]
            return self.counts["max_ts_us"]
        ts = pd.Timestamp(self.as_of)
        return int((ts.tz_convert("UTC") if ts.tz else ts.tz_localize("UTC")).value // 1000)

    @property
    def _footprints_as_of_us(self) -> int:
        """``as_of_us``, or, when no interaction is left to label (every event type filtered out),
        a time before any: no footprint rows, rather than a failure."""
        return self.as_of_us if self.as_of_us is not None else -(2 ** 62)

    @functools.cached_property
    def footprints(self):
        """Ibis table: footprints with known_since_us, as of ``as_of_us``."""
        if self.carried is None:
            return footprint_rows(self.base, self.transitions, self.config, self._footprints_as_of_us)
        # every carried topic's row, so from every topic's stand-ins (``base`` may hold only the touched
        # topics'; the transitions after the watermark are the same in both)
        return footprint_rows(self._with_all_carried, self.transitions, self.config, self._footprints_as_of_us,
                              history=self.history, carried=self.carried[0], carried_until_us=self.carried_until_us)

    @functools.cached_property
    def touched_footprints(self):
        """With carried state: the footprints of only the topics the new events qualify for (the
        others are the carried rows, aged, with the new history_len). Without: ``footprints``."""
        if self.carried is None:
            return self.footprints
        return footprint_rows(self.base, self.transitions, self.config, self._footprints_as_of_us, history=self.history,
                              carried=self.carried[0] if self._touched_carried is None else self._touched_carried,
                              carried_until_us=self.carried_until_us, touched_only=True)

    @property
    def history(self):
        """Ibis table: (user_id, history_len), each user's interactions up to ``as_of_us``."""
        if self.carried is None:
            return user_history(self.base, self.as_of_us)
        return continued_history(self.base, self.carried[1], self.as_of_us)

    def materialize(self) -> "LabelRun":
        """Compute the labels once into an engine table (which spills to disk) for several reads.

        Sorting, summarising and hashing then read that table: the window stages are done and
        have released their memory before a sort starts.
        """
        if not self.materialized:
            self.share_base()  # whoever reads labels several times reads footprints too
            labels = self.labels
            if self._scanned is None:  # the scan plan's labels are a table already
                self.labels = labels.cache()
            self.materialized = True
        return self

    def piece(self, interactions, as_of) -> "LabelRun":
        """The plan of this run's rules over ``interactions`` (one piece of its users) as of ``as_of``."""
        return plan_labels(interactions, self.taxonomy, self.config, engine=self.engine, as_of=as_of)

    def release(self) -> None:
        """Drop the engine tables ``materialize`` cached (the run is not read again after this)."""
        for t in (self._labels, self._base, self._new_rows, self._touched_carried):
            if hasattr(t, "release"):
                t.release()
        if self._scanned is not None:
            self._scanned.release()
            self._scanned = None

    # -- results as Arrow / pandas --------------------------------------------------------------
    def _labels_sorted(self):
        t = self.labels
        return t.order_by([ibis.asc(t[k], nulls_first=False) for k in SORT_KEYS])

    def labels_unordered(self) -> pa.Table:
        """The labels query's rows (with ``ts_us``, without the version columns) as Arrow, in no
        particular order: the cheapest read (with the scan plan, the rows as the pass kept them; when
        the pass runs for this read, it keeps them all in memory, where they are going anyway)."""
        if self._labels is None:
            self._labels = self._scan_labels(hold=True)
        return self._scanned.arrow() if self._scanned is not None else self.engine.to_arrow(self._labels)

    def labels_arrow(self) -> pa.Table:
        t = self.engine.to_arrow(self._labels_sorted().drop("ts_us"))
        return finish_labels(t, self.taxonomy_version, self.labels_version)

    def labels_frame(self) -> pd.DataFrame:
        return self.labels_arrow().to_pandas()

    def footprints_arrow(self) -> pa.Table:
        if self.written is not None:
            return pq.read_table(self.written["footprints"])
        t = self.footprints
        t = t.order_by([t.user_id, t.level, t.topic_id])
        return finish_footprints(self.engine.to_arrow(t))

    def footprint_batches(self, rows: int = 65_536, touched_only: bool = False):
        """The footprints in key order (user, level, topic) as Arrow record batches, streamed from
        the engine, so that memory follows a batch rather than the population (``touched_only``:
        see ``touched_footprints``)."""
        if self.written is not None:
            yield from pq.ParquetFile(self.written["footprints"]).iter_batches(batch_size=rows)
            return
        t = self.touched_footprints if touched_only else self.footprints
        for batch in self.engine.sorted_batches(t, ["user_id", "level", "topic_id"], rows):
            yield from finish_footprints(pa.Table.from_batches([batch])).to_batches()

    def history_frame(self) -> pd.DataFrame:
        """user_id, history_len: each user's interactions up to ``as_of_us`` (unplaced ones included)."""
        return self.history_arrow().to_pandas()

    def history_arrow(self) -> pa.Table:
        if self.written is not None:
            return self.written["history"]
        return self.engine.to_arrow(self.history)

    def history_batches(self, rows: int = 65_536):
        """The histories in user order as Arrow record batches, streamed from the engine."""
        if self.written is not None:
            yield from self.written["history"].sort_by("user_id").to_batches(rows)
            return
        yield from self.engine.sorted_batches(self.history, ["user_id"], rows)

    def footprints_frame(self) -> pd.DataFrame:
        return self.footprints_arrow().to_pandas()

    def content_hash(self) -> str:
        """Order-independent canonical hash of the labels rows, equal across engines and machines."""
        return sums_digest(self.engine.content_sums(self.labels, CONTENT_COLUMNS), self._hash_extra)

    @property
    def _hash_extra(self) -> str:
        return f"{self.taxonomy_version}\x00{self.labels_version}"

    # -- summary --------------------------------------------------------------------------------
    def summary_parts(self) -> dict[str, Any]:
        """The summary's raw counts, additive over runs on disjoint sets of users."""
        t = self.labels
        by = t.group_by(["level", "label"]).aggregate(n=t.count(), disc=t.discovery.cast("int64").sum(),
                                                      boosted=(t.reward_multiplier > 1).cast("int64").sum())
        week = t.mutate(week=t.ts.truncate("W").date())
        wk = week.group_by(["level", "week"]).aggregate(
            n=week.count(), new=(week.label == "new_interest").cast("int64").sum())
        users = int(self.engine.to_pandas(t.aggregate(u=t.user_id.nunique()))["u"].iloc[0])
        per = t.group_by(["user_id", "item_id", "ts_us", "event_id"]).aggregate(
            placed=(t.label != "unplaced").cast("int64").max())
        unplaced = per.filter(per.placed == 0)
        no_topic = int(self.engine.to_pandas(unplaced.aggregate(n=unplaced.count()))["n"].iloc[0])
        return {"by": self.engine.to_pandas(by), "weeks": self.engine.to_pandas(wk), "users": users,
                "no_topic": no_topic, "counts": dict(self.counts)}

    def summary(self, parts: dict[str, Any] | None = None) -> dict[str, Any]:
        """Counts per label and level, new-interest and discovery shares, weekly new-interest rate."""
        p = parts or self.summary_parts()
        by, wk = p["by"], p["weeks"].sort_values(["level", "week"])
        levels = {}
        for level, g in by.groupby("level"):
            total = int(g["n"].sum())
            counts = {lab: int(g.loc[g["label"] == lab, "n"].sum()) for lab in LABEL_VALUES}
            w = wk[wk["level"] == level]
            levels[str(int(level))] = {
                "rows": total, "labels": counts,
                "new_interest_share": _share(counts["new_interest"], total),
                "discovery_share": _share(int(g["disc"].sum()), total),
                "boosted_share": _share(int(g["boosted"].sum()), total),
                "unplaced_share": _share(counts["unplaced"], total),
                "new_interest_rate_by_week": [
                    {"week": str(r.week), "rows": int(r.n), "new_interest_rate": _share(int(r.new), int(r.n))}
                    for r in w.itertuples()]}
        as_of = self.as_of_us if self.as_of is not None else p["counts"]["max_ts_us"]
        return {"taxonomy_version": self.taxonomy_version, "labels_version": self.labels_version,
                "tool_version": __version__, "users": p["users"], "input": {
                    "source": self.intake.source, "rows": self.intake.rows_in,
                    **{k: v for k, v in p["counts"].items() if k != "max_ts_us"},
                    "interactions_on_items_without_topics": p["no_topic"],
                    "notes": self.intake.notes},
                "as_of": _iso_us(as_of), "config": json.loads(self.config.canonical_json()),
                "levels": levels}

    # -- writing --------------------------------------------------------------------------------
    def write(self, out_dir: str | os.PathLike, progress: bool = False) -> dict[str, Any]:
        """Write labels (Parquet partitioned by date), footprints and summary.json atomically.

        A run over more than ``engine.bucket_rows`` interactions is labelled in pieces of users
        (ranges of user ids, each piece in memory), so time grows linearly and memory stays
        bounded; the files are the same bytes either way. ``progress`` shows the pieces' progress
        (interactions and users done, rate, time left).
        """
        out = Path(out_dir)
        out.mkdir(parents=True, exist_ok=True)
        tmp = out / f".tmp-{uuid.uuid4().hex}"
        tmp.mkdir()
        limit = getattr(self.engine.config, "bucket_rows", None)
        pieces = limit is not None and self.intake.rows_in > limit and self.carried is None \
            and self.taxonomy is not None and not hasattr(self.engine, "write_partitioned")
        try:
            n, fp_rows, summary, history = self._write_to(tmp, limit, pieces, progress)
            summary["outputs"].update(labels_rows=n, footprints_rows=fp_rows)
            (tmp / "summary.json").write_text(json.dumps(summary, indent=2, sort_keys=True) + "\n")
        except BaseException:
            shutil.rmtree(tmp, ignore_errors=True)  # a failed write leaves nothing half-written behind
            raise
        for name in ("labels", "footprints.parquet", "summary.json"):  # summary.json goes last
            dest = out / name
            if dest.exists():
                trash = out / f".old-{uuid.uuid4().hex}"
                os.replace(dest, trash)
                shutil.rmtree(trash, ignore_errors=True) if trash.is_dir() else trash.unlink()
            os.replace(tmp / name, dest)
        shutil.rmtree(tmp, ignore_errors=True)
        if pieces:
            self.written = {"footprints": out / "footprints.parquet", "history": history[0], "as_of_us": history[1],
                            "pieces": history[2]}
        log.info("wrote %d label rows and %d footprint rows to %s", n, fp_rows, out)
        return summary

    def _write_to(self, tmp: Path, limit, pieces: bool, progress: bool):
        """Labels and footprints into ``tmp``: (label rows, footprint rows, summary, history)."""
        history = None
        if pieces:
            n, fp_rows, summary, history = write_in_pieces(self, tmp, limit, progress)
        else:
            self.materialize()
            if hasattr(self.engine, "write_partitioned"):  # a distributed engine writes from its workers
                t = self.labels
                t = t.mutate(date=t.ts.date().cast("string"), taxonomy_version=ibis.literal(self.taxonomy_version),
                             labels_version=ibis.literal(self.labels_version))
                n = self.engine.write_partitioned(t, tmp / "labels", list(SORT_KEYS), LABELS_SCHEMA)
            else:
                n = write_by_date(self, tmp / "labels")
            fp = self.footprints_arrow()
            write_whole(fp, tmp / "footprints.parquet", output_compression(self.engine))
            fp_rows = fp.num_rows
            summary = self.summary()
            summary["outputs"] = {"labels_content_hash": self.content_hash()}
        return n, fp_rows, summary, history


def _share(a: int, b: int) -> float:
    return round(a / b, 6) if b else 0.0


def _iso_us(us: int | None) -> str | None:
    if us is None:
        return None
    return pd.Timestamp(us, unit="us", tz="UTC").isoformat()


def plan_labels(interactions, taxonomy, config: LabelConfig | None = None, *,
                input_config: InputConfig | None = None, engine: Engine | None = None,
                as_of=None, source: str | None = None, carried: Carried | None = None) -> LabelRun:
    """Validate the inputs and plan labels and footprints on ``engine`` (DuckDB by default).

    With ``carried``, the interactions are the events after the carried watermark of the users
    being continued, and the plan labels only them, from that state (see :class:`Carried`).
    """
    cfg = config or LabelConfig()
    eng = engine or make_engine()
    ev, intake = interactions_table(eng, interactions, input_config, source)
    it, levels, has_valid, single_topic = item_topics_table(eng, taxonomy, cfg)
    prepared, heavy = prepare(ev, cfg), None
    if cfg.max_user_events is not None:  # one user's history is one ordered sequence: bots stall a task
        if carried is not None:
            from ..errors import ConfigError
            raise ConfigError("labels.max_user_events cannot be continued from carried state: a user "
                              "crossing the limit loses every earlier label. Label the whole history.")
        heavy = heavy_users(prepared, cfg).cache()
        prepared = prepared.anti_join(heavy, "user_id")
    state, until, new_rows = None, None, None
    if carried is not None:
        state, until = carried.tables(eng), carried.watermark_us
        first = eng.to_pandas(ev.aggregate(m=ev.ts_us.min()))["m"].iloc[0]
        if first is not None and not pd.isna(first) and int(first) <= until:
            from ..errors import InputError
            raise InputError(f"an event at {_iso_us(int(first))} is not after the carried watermark "
                             f"{_iso_us(until)}.", source=intake.source, column="ts",
                             hint="Continue from carried state only with later events; label the users "
                                  "of earlier ones over their whole history.")
        prepared = continue_history(prepared, state[1])
    base = whole = topic_rows(prepared, it, levels, has_valid)
    touched = None
    if state is not None:
        base = new_rows = base.cache()  # the new events' topic rows are read three times below: collapse them once
        whole = base.union(carried_rows(state[0], base, cfg), distinct=False)
        if cfg.memory_us is None:  # the carried rows of the topics the new events name: their stand-ins and
            # the touched footprints both read them, so they are read from the previous file once
            touched = touched_carried(base, state[0]).cache()
        base = with_carried(base, state[0], cfg, touched=touched)
    transitions = known_transitions(base, cfg)
    scan = scan_applies(eng, cfg, intake.rows_in)
    labels = None if scan else _label_expr(base, transitions, cfg, single_topic, _topic_bound(taxonomy), until)
    raw = None
    if scan and state is None:  # the scan checks for duplicates itself: try without the collapse first
        raw = topic_rows(prepare(ev, cfg, collapse=False), it, levels, has_valid)
    version = hashlib.sha256("\x00".join([taxonomy.version, cfg.canonical_json(), intake.content_hash,
                                          __version__]).encode()).hexdigest()
    return LabelRun(eng, cfg, taxonomy.version, version, labels, base, transitions, ev, intake, as_of, heavy=heavy,
                    single_topic=single_topic, carried=state, carried_until_us=until, taxonomy=taxonomy,
                    _with_all_carried=whole, _new_rows=new_rows, _touched_carried=touched, scan=scan,
                    _raw_rows=raw)


def _chunk_labels(engine: Engine, cfg: LabelConfig, single_topic: bool, after_us: int | None):
    """A function from an Arrow chunk of scanned rows to its labels (after ``after_us``): the
    relational projection (``label_rows``) runs on the chunk in the engine, and the interaction's own
    columns are taken from the chunk rather than copied through the engine (at 50M rows the
    projection took 12.9 s with them)."""
    def query(rows):  # the rows of one interaction share its time: filtering them filters it
        return label_rows(rows if after_us is None else rows.filter(rows.ts_us > after_us), cfg, single_topic,
                          row_id="_row")
    run = engine.query_each(query)

    def label(chunk: pa.Table) -> pa.Table:
        n = chunk.num_rows
        got = run(chunk.append_column("_row", pa.array(np.arange(n, dtype=np.int64))))
        own = _rows_at(chunk.select(list(INTERACTION_COLUMNS)), got["_row"].to_numpy())
        got = got.drop_columns(["_row"])
        return pa.Table.from_arrays([*own.columns, *got.columns], names=[*own.column_names, *got.column_names])
    return label


def _rows_at(table: pa.Table, rows: np.ndarray) -> pa.Table:
    """``table.take(rows)``, as zero-copy slices when ``rows`` runs in a few ascending stretches (the
    engine returns a projection's 64k-row batches in any order: at 50M rows the copy took 1.5 s)."""
    if len(rows) == table.num_rows and np.array_equal(rows, np.arange(len(rows))):
        return table
    if not len(rows):
        return table.slice(0, 0)
    starts = np.flatnonzero(np.diff(rows, prepend=-2) != 1)
    if len(starts) > max(1, len(rows) >> 12):  # filtered or aggregated: many short stretches
        return table.take(rows)
    ends = np.append(starts[1:], len(rows))
    return pa.concat_tables([table.slice(int(rows[a]), int(b - a)) for a, b in zip(starts, ends)])


def _topic_bound(taxonomy) -> int:
    """At least as many as the topics one user can know at one level."""
    return max(len(taxonomy.topics), int(taxonomy.item_topics["topic_id"].nunique()))


def _label_expr(base, transitions, cfg: LabelConfig, single_topic: bool, topics: int, after_us: int | None = None):
    labels = label_rows(with_known_topics(with_support(base, cfg), transitions, cfg, topics), cfg, single_topic)
    return labels if after_us is None else labels.filter(labels.ts_us > after_us)  # stand-ins are never labelled


def _intake_counts(eng, ev, rows, cfg, intake: Intake, heavy=None) -> dict[str, int]:
    """What preparing the log set aside, from the topic rows (each interaction once per level at pos 0)."""
    n_typed = intake.rows_in
    if cfg.event_types is not None:
        typed = ev.filter(ev.event_type.isin(list(cfg.event_types)))
        n_typed = int(eng.to_pandas(typed.aggregate(n=typed.count()))["n"].iloc[0])
    once = each_interaction_once(rows)
    stats = eng.to_pandas(once.aggregate(n=once.count(), mx=once.ts_us.max()))
    n_out = int(stats["n"].iloc[0])
    set_aside = {"users_over_max_user_events": 0, "interactions_of_those_users": 0}
    if heavy is not None:
        h = eng.to_pandas(heavy.aggregate(u=heavy.count(), n=heavy.events.sum()))
        set_aside = {"users_over_max_user_events": int(h["u"].iloc[0] or 0),
                     "interactions_of_those_users": int(h["n"].iloc[0] or 0)}
    return {"dropped_event_type": intake.rows_in - n_typed,
            "duplicate_events_collapsed": n_typed - n_out - set_aside["interactions_of_those_users"],
            **set_aside, "interactions_labelled": n_out, "max_ts_us": int(stats["mx"].iloc[0]) if n_out else None}


def label_interactions(interactions, taxonomy, config: LabelConfig | None = None, **kwargs) -> pd.DataFrame:
    """The labels table, sorted by user_id, ts, event_id, item_id, level (see DESIGN.md).

    >>> import pandas as pd
    >>> from labeler.taxonomy import Taxonomy
    >>> items = pd.DataFrame({"item_id": ["a", "b"], "category": ["knitting", "bonsai"]})
    >>> tax = Taxonomy.from_categories(items)
    >>> log = pd.DataFrame({"user_id": ["u1"] * 3, "item_id": ["a", "a", "b"],
    ...                     "ts": ["2026-03-01T10:00:00Z", "2026-03-02T10:00:00Z", "2026-03-03T10:00:00Z"]})
    >>> label_interactions(log, tax)["label"].tolist()
    ['cold_start', 'in_profile', 'new_interest']
    """
    return plan_labels(interactions, taxonomy, config, **kwargs).labels_frame()


def build_footprints(interactions, taxonomy, config: LabelConfig | None = None, **kwargs) -> pd.DataFrame:
    """The footprints table as of the last input timestamp (or ``as_of=``)."""
    return plan_labels(interactions, taxonomy, config, **kwargs).footprints_frame()

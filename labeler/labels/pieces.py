"""A labelling run in pieces: ranges of users labelled one at a time, in user order, appended to
the same files as one pass would write (see :mod:`labeler.labels.files`), so memory follows the
piece while the outputs stay the same bytes.
"""
from __future__ import annotations

import logging
import shutil
from pathlib import Path
from typing import NamedTuple

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from ..engines import Engine, sums_digest
from .files import CONTENT_COLUMNS, DAY_US, FOOTPRINTS_SCHEMA, DateFiles, RowGroupWriter, allow_open_files, \
    output_compression, write_by_date
from .intake import _COLUMNS as _INPUT_COLUMNS
from .intake import Staged
from .rules import prepare

log = logging.getLogger(__name__)


class Piece(NamedTuple):
    """A range [lo, hi) of user ids (None: open), with its interactions and users."""

    lo: str | None
    hi: str | None
    rows: int
    users: int


SAMPLE_ROWS = 1_000_000  # the rows whose users set the pieces' cut


def cut_users(engine: Engine, ev, rows: int, limit: int) -> list[Piece]:
    """Ranges of user ids for pieces of about ``limit`` of the ``rows`` interactions of ``ev``, from
    the interactions per user in a sample of about SAMPLE_ROWS rows (Bernoulli, seeded; every row
    of a smaller log, whose counts are then exact). Counting every user's rows of a large log is
    itself a large aggregation: at 1B interactions of 20M users it ran out of a 2 GB memory limit.
    The cut sets only the pieces' sizes (a piece's ``rows`` and ``users`` are estimates when
    sampled): the outputs are the same bytes for any cut."""
    fraction = min(1.0, SAMPLE_ROWS / rows) if rows else 1.0
    sample = ev if fraction >= 1.0 else ev.sample(fraction, method="row", seed=7)
    counts = engine.to_arrow(sample.group_by("user_id").aggregate(n=sample.count()))
    if fraction < 1.0:
        scaled = pc.cast(pc.ceil(pc.divide(pc.cast(counts.column("n"), pa.float64()), fraction)), pa.int64())
        counts = counts.set_column(counts.schema.get_field_index("n"), "n", scaled)
    return user_pieces(counts, limit)


def rows_in(files: list[str]) -> int:
    """Rows of Parquet files, from their footers."""
    return sum(pq.ParquetFile(f).metadata.num_rows for f in files)


def user_pieces(counts: pa.Table, limit: int) -> list[Piece]:
    """Ranges of user ids, in id order, each holding about ``limit`` interactions (a heavier user
    is a range of its own). ``counts``: user_id, n.

    Greedy: a range takes the next user while it stays within ``limit`` (and always takes one);
    found by binary search over the running total, so tens of millions of users cost a search per
    range, not Python work per user."""
    counts = counts.take(pc.sort_indices(counts, [("user_id", "ascending")]))
    ids = counts.column("user_id")
    total = np.concatenate([[0], np.cumsum(counts.column("n").to_numpy())])
    pieces, i, users = [], 0, counts.num_rows
    while i < users or not pieces:
        j = max(int(np.searchsorted(total, total[i] + limit, side="right")) - 1, i + 1) if users else 0
        pieces.append(Piece(ids[i].as_py() if i else None, ids[j].as_py() if j < users else None,
                            int(total[j] - total[i]), j - i))
        i = j
    return pieces


def write_in_pieces(run, tmp: Path, limit: int, progress: bool = False):
    """Label ``run`` (a :class:`~labeler.labels.plan.LabelRun`) one range of users at a time, in user order.

    Every rule is per user, so a piece's rows are exactly the whole run's rows of its users; each
    piece's rows are appended, sorted, to the open date files (:class:`DateFiles`) and footprints,
    so each file is the pieces' rows in range order, cut into the same row groups as a single
    pass: the same bytes. Returns (label rows, footprint rows, summary, (history table, as_of_us,
    pieces)).
    """
    eng, cfg, ev = run.engine, run.config, run.ev
    # the latest kept event: the collapse of duplicates keeps their time, so without max_user_events
    # (which counts collapsed rows) it is the latest event of a kept type
    kept = None if cfg.event_types is None else ev.event_type.isin(list(cfg.event_types))
    span = eng.to_arrow(ev.aggregate(mx=ev.ts_us.max(where=kept), mn=ev.ts_us.min()))
    latest, earliest = span.column("mx")[0].as_py(), span.column("mn")[0].as_py()
    if run.as_of is not None:
        as_of_us = run.as_of_us
    elif cfg.max_user_events is None:
        as_of_us = latest
    else:
        prepared = prepare(ev, cfg)
        stats = eng.to_arrow(prepared.group_by("user_id").aggregate(n=prepared.count(), mx=prepared.ts_us.max()))
        keep = stats.filter(pc.less_equal(stats.column("n"), cfg.max_user_events))
        as_of_us = pc.max(keep.column("mx")).as_py()
    as_of = None if as_of_us is None else pd.Timestamp(as_of_us, unit="us", tz="UTC")
    ranges = cut_users(eng, ev, run.intake.rows_in, limit)
    log.info("labelling %d interactions in %d pieces of about %d", run.intake.rows_in, len(ranges), limit)
    n = 0
    sums = [0, 0, 0]
    parts, histories = [], []
    # every date's file and the footprints stay open while the pieces append to them in order
    if earliest is not None:
        allow_open_files(max((latest or earliest) // DAY_US - earliest // DAY_US, 0) + 1, run.intake.rows_in)
    dates = DateFiles(tmp / "labels", parked=tmp / "parked", compression=output_compression(eng))
    footprints = RowGroupWriter(tmp / "footprints.parquet", FOOTPRINTS_SCHEMA, output_compression(eng))
    from tqdm import tqdm
    bar = tqdm(total=run.intake.rows_in, unit=" interactions", unit_scale=True, disable=not progress,
               desc="labelling in pieces")
    users_done = 0
    # one pass cuts the input into the pieces' files: each piece then reads its own rows only
    scattered = eng.scatter(ev.select(*_INPUT_COLUMNS), "user_id", [p.hi for p in ranges[:-1]], tmp / "scatter")
    for k, (lo, hi, _, _) in enumerate(ranges):
        piece_rows = rows_in(scattered[k])
        sel = eng.read_parquet(scattered[k])
        staged = Staged(sel, source=run.intake.source, rows=piece_rows,
                        content_hash=run.intake.content_hash)
        sub = run.piece(staged, as_of).materialize()
        sub.labels_version = run.labels_version
        n += write_by_date(sub, tmp / "labels", dates)
        footprints.add(sub.footprints_arrow())
        histories.append(sub.history_arrow())
        parts.append(sub.summary_parts())
        sums = [x + y for x, y in zip(sums, eng.content_sums(sub.labels, CONTENT_COLUMNS))]
        sub.release()
        shutil.rmtree(tmp / "scatter" / f"_piece={k}")
        log.info("piece %d of %d: users [%s, %s), %d interactions", k + 1, len(ranges), lo, hi, piece_rows)
        users_done += parts[-1]["users"]
        bar.set_postfix_str(f"{users_done:,} users, piece {k + 1}/{len(ranges)}")
        bar.update(piece_rows)
    bar.close()
    dates.close()
    footprints.close()
    fp_rows = footprints.rows
    shutil.rmtree(tmp / "parked")
    counts = {}
    for p in parts:
        for key, v in p["counts"].items():
            counts[key] = (max(x for x in (counts.get(key), v) if x is not None) if counts.get(key) is not None
                           else v) if key == "max_ts_us" else counts.get(key, 0) + v
    merged = {"by": pd.concat([p["by"] for p in parts]).groupby(["level", "label"], as_index=False).sum(),
              "weeks": pd.concat([p["weeks"] for p in parts]).groupby(["level", "week"], as_index=False).sum(),
              "users": sum(p["users"] for p in parts), "no_topic": sum(p["no_topic"] for p in parts),
              "counts": counts}
    summary = run.summary(merged)
    summary["outputs"] = {"labels_content_hash": sums_digest(tuple(sums), run._hash_extra)}
    history = pa.concat_tables(histories) if histories else pa.table({"user_id": [], "history_len": []})
    return n, fp_rows, summary, (history, as_of_us, len(ranges))

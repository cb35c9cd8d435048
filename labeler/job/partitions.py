"""Interaction partitions: finding them, telling new from changed, and staging them.

An interactions folder holds one partition per UTC event date, either a folder
``date=YYYY-MM-DD/`` of Parquet or CSV files or a file ``YYYY-MM-DD.parquet`` / ``.csv``.
Staging validates a partition once, sets aside (quarantines) events whose timestamps cannot
belong to it, and stores the accepted events as typed Parquet the engine scans lazily.
"""
from __future__ import annotations

import dataclasses
import datetime as dt
import logging
import os
import re
import uuid
from pathlib import Path

import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from ..config import InputConfig
from ..errors import InputError, LabelerError
from ..labels.files import DAY_US
from ..labels.intake import files_hash, interactions_schema
from ..tables import normalize_interactions, read_table
from . import failpoints

log = logging.getLogger(__name__)

_DATE = r"(\d{4}-\d{2}-\d{2})"
_DIR = re.compile(rf"^date={_DATE}$")
_FILE = re.compile(rf"^{_DATE}\.(parquet|pq|csv)$", re.IGNORECASE)
_DATA = (".parquet", ".pq", ".csv")


@dataclasses.dataclass
class Partition:
    name: str                 # the UTC date, YYYY-MM-DD
    path: Path
    files: list[Path]

    def stat_key(self) -> list:
        """Names, sizes and modification times: a cheap test for 'maybe changed'."""
        out = []
        for f in self.files:
            st = f.stat()
            out.append([str(f.relative_to(self.path.parent)), st.st_size, st.st_mtime_ns])
        return out

    def content_hash(self) -> str:
        return files_hash(self.path)

    @property
    def start_us(self) -> int:
        d = dt.date.fromisoformat(self.name)
        return int(dt.datetime(d.year, d.month, d.day, tzinfo=dt.timezone.utc).timestamp()) * 1_000_000


def discover(root: Path) -> tuple[list[Partition], list[str]]:
    """Partitions under ``root`` in date order, and the entries that are not partitions."""
    if not root.is_dir():
        raise InputError("not a folder of date partitions.", source=str(root),
                         hint="Point 'interactions' at a folder holding date=YYYY-MM-DD/ folders or "
                              "YYYY-MM-DD.parquet / .csv files.")
    parts, ignored = {}, []
    for entry in sorted(root.iterdir()):
        if entry.name.startswith((".", "_")):
            continue
        m = _DIR.match(entry.name) if entry.is_dir() else _FILE.match(entry.name)
        if not m or not _valid_date(m.group(1)):
            ignored.append(entry.name)
            continue
        files = [entry] if entry.is_file() else sorted(
            f for f in entry.rglob("*") if f.is_file() and f.suffix.lower() in _DATA
            and not f.name.startswith((".", "_")))
        if m.group(1) in parts:
            raise InputError(f"date {m.group(1)} appears twice ({parts[m.group(1)].path.name} and "
                             f"{entry.name}).", source=str(root), hint="Keep one partition per date.")
        parts[m.group(1)] = Partition(m.group(1), entry, files)
    if ignored:
        log.warning("%s: ignored %d entries that are not date partitions: %s", root, len(ignored),
                    ", ".join(ignored[:5]))
    return [parts[k] for k in sorted(parts)], ignored


def _valid_date(text: str) -> bool:
    try:
        dt.date.fromisoformat(text)
        return True
    except ValueError:
        return False


@dataclasses.dataclass
class Staged:
    """What staging one partition produced (kept in the job state)."""

    hash: str
    files: list
    events: str               # staged events file, relative to the work folder
    rows_in: int
    rows: int
    quarantined: int
    forgotten: int
    min_ts_us: int | None
    max_ts_us: int | None

    def to_json(self) -> dict:
        return dataclasses.asdict(self)


def stage(part: Partition, content_hash: str, work: Path, cfg: InputConfig, horizon_days: float,
          forgotten: set[str]) -> Staged:
    """Validate one partition and write its accepted events; raises InputError naming the path."""
    frames = []
    for f in part.files:
        try:
            frames.append(read_table(f))
        except LabelerError:
            raise
        except Exception as exc:  # a truncated or corrupt file: name it, never a deep traceback
            raise InputError(f"could not be read ({type(exc).__name__}: {exc}).", source=str(f),
                             hint="Fix or replace the file; the partition is retried on the next run.") from None
    if not frames:
        raise InputError("the partition holds no data files.", source=str(part.path),
                         hint="Put .parquet or .csv files in it, or remove it.")
    for f, frame in zip(part.files[1:], frames[1:]):  # one partition, one schema
        first = frames[0]
        if list(frame.columns) != list(first.columns) or any(
                str(frame[c].dtype) != str(first[c].dtype) for c in first.columns):
            diff = sorted(set(map(str, frame.columns)) ^ set(map(str, first.columns))) or [
                c for c in first.columns if str(frame[c].dtype) != str(first[c].dtype)]
            raise InputError(f"its schema differs from {part.files[0].name}'s (column '{diff[0]}': "
                             f"{', '.join(f'{c} {t}' for c, t in first.dtypes.astype(str).items())} vs "
                             f"{', '.join(f'{c} {t}' for c, t in frame.dtypes.astype(str).items())}).",
                             source=str(f), column=str(diff[0]),
                             hint="Write every file of a partition with the same columns and types.")
    df = pd.concat(frames, ignore_index=True) if len(frames) > 1 else frames[0]
    rows_in = len(df)
    if rows_in:
        norm, _ = normalize_interactions(df, cfg, str(part.path))
    else:
        norm = pd.DataFrame(columns=interactions_schema().names)
    table = pa.Table.from_pandas(norm[interactions_schema().names], schema=interactions_schema(),
                                 preserve_index=False)
    if forgotten:
        from ..store.layout import user_digest
        users = table.column("user_id").to_pylist()
        keep = pa.array([user_digest(u) not in forgotten for u in users])
        n_forgotten = table.num_rows - int(pc.sum(keep).as_py() or 0)
        table = table.filter(keep)
    else:
        n_forgotten = 0
    ts = pc.cast(table.column("ts"), pa.int64())
    lo, hi = part.start_us - int(horizon_days * DAY_US), part.start_us + DAY_US
    ok = pc.and_(pc.greater_equal(ts, lo), pc.less(ts, hi))
    accepted, late = table.filter(ok), table.filter(pc.invert(ok))
    accepted = accepted.sort_by([("user_id", "ascending"), ("ts", "ascending"), ("item_id", "ascending")])
    name = f"{part.name}-{content_hash[:16]}.parquet"
    _write(accepted, work / "events" / name)
    if late.num_rows:
        _write(late, work / "quarantine" / name)
        log.warning("%s: quarantined %d events whose time is before %s or after the partition's day",
                    part.path, late.num_rows, pd.Timestamp(lo, unit="us", tz="UTC").date())
    ats = pc.cast(accepted.column("ts"), pa.int64())
    return Staged(hash=content_hash, files=part.stat_key(), events=f"events/{name}", rows_in=rows_in,
                  rows=accepted.num_rows, quarantined=late.num_rows, forgotten=n_forgotten,
                  min_ts_us=pc.min(ats).as_py(), max_ts_us=pc.max(ats).as_py())


def _write(table: pa.Table, dest: Path) -> None:
    dest.parent.mkdir(parents=True, exist_ok=True)
    tmp = dest.with_name(f".{dest.name}.{uuid.uuid4().hex}")
    failpoints.hit("write_events")
    # LZ4 pages, dictionaries only for the few-valued columns (as the outputs are written): on a day of
    # 1M events written in half the time of pyarrow's defaults and read in half the time, 5% larger
    pq.write_table(table, tmp, row_group_size=262_144, compression="lz4", use_dictionary=["event_type", "arm"])
    os.replace(tmp, dest)

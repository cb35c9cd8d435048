"""Column contracts of every table, and the normalisation applied on the way in.

Ids become strings (ints are cast, and said so); timestamps become UTC with microsecond
precision (finer digits truncated); naive timestamps need a configured timezone; integer epochs
need an explicit unit. Every error names the source, the column and a few offending rows.
Nothing is dropped silently: :class:`Intake` counts whatever was changed or set aside.
"""
from __future__ import annotations

import dataclasses
import logging
import math
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from .config import InputConfig
from .errors import InputError

log = logging.getLogger(__name__)

TS_TYPE = pa.timestamp("us", tz="UTC")

ITEMS_REQUIRED = ("item_id",)
INTERACTIONS_REQUIRED = ("user_id", "item_id", "ts")
INTERACTIONS_OPTIONAL = ("engagement", "event_id", "event_type", "arm")
ITEM_TOPICS_COLUMNS = ("item_id", "level", "topic_id", "confidence")
TOPICS_COLUMNS = ("topic_id", "level", "parent_id", "name", "keywords", "size", "first_version")
LABELS_COLUMNS = ("user_id", "item_id", "ts", "event_id", "level", "topic_id", "label", "engaged",
                  "discovery", "reward_multiplier", "shaped_reward", "history_len", "known_topics",
                  "taxonomy_version", "labels_version")
FOOTPRINTS_COLUMNS = ("user_id", "level", "topic_id", "first_ts", "last_ts", "interactions",
                      "engaged_interactions", "known", "known_since")
LABEL_VALUES = ("unplaced", "cold_start", "in_profile", "new_interest")
_ENGAGEMENT_MAX = 1e300  # times any multiplier a config allows, still finite


@dataclasses.dataclass
class Intake:
    """What happened to a table on the way in: counts of everything changed or set aside."""

    source: str
    rows_in: int = 0
    rows_out: int = 0
    notes: list[str] = dataclasses.field(default_factory=list)
    dropped: dict[str, int] = dataclasses.field(default_factory=dict)
    content_hash: str = ""

    def note(self, text: str) -> None:
        self.notes.append(text)
        log.info("%s: %s", self.source, text)

    def drop(self, reason: str, n: int) -> None:
        if n:
            self.dropped[reason] = self.dropped.get(reason, 0) + int(n)
            self.note(f"set aside {n} rows: {reason}")


def read_table(path: str | Path) -> pd.DataFrame:
    """Read a Parquet or CSV file (or a folder of Parquet files) into pandas, with clear errors."""
    p = Path(path)
    if not p.exists():
        raise InputError("file not found.", source=str(p), hint="Check the path and try again.")
    try:
        if p.is_dir() or p.suffix.lower() in (".parquet", ".pq"):
            table = pq.read_table(p)
            _duplicate_columns(table.column_names, str(p))
            df = table.to_pandas()
        elif p.suffix.lower() in (".csv", ".tsv"):
            sep = "\t" if p.suffix.lower() == ".tsv" else ","
            _duplicate_columns(pd.read_csv(p, sep=sep, nrows=0, encoding="utf-8").columns, str(p))
            df = pd.read_csv(p, sep=sep, dtype=str, keep_default_na=False, na_values=[""], encoding="utf-8")
        else:
            raise InputError(f"unknown file type '{p.suffix}'.", source=str(p),
                             hint="Give a .parquet, .csv or .tsv file.")
    except InputError:
        raise
    except UnicodeDecodeError as exc:
        raise InputError(f"not valid UTF-8 ({exc}).", source=str(p),
                         hint="Re-encode the file as UTF-8.") from None
    except Exception as exc:  # pyarrow/pandas parse errors come in many classes
        raise InputError(f"could not be parsed ({type(exc).__name__}: {exc}).", source=str(p),
                         hint="Check the file is a complete Parquet or CSV file.") from None
    if len(df) == 0:
        raise InputError("the file has no rows.", source=str(p), hint="Give a non-empty table.")
    return df


def _duplicate_columns(columns, source: str) -> None:
    """Refuse a table whose header names one column twice (CSV readers rename the second 'x.1')."""
    names = [str(c) for c in columns]
    dup = sorted({n for n in names if names.count(n) > 1})
    mangled = sorted(n for n in names if "." in n and n.rsplit(".", 1)[1].isdigit() and n.rsplit(".", 1)[0] in names)
    if dup or mangled:
        first = (dup or [m.rsplit(".", 1)[0] for m in mangled])[0]
        raise InputError(f"the header names column '{first}' more than once (columns: {', '.join(names)}).",
                         source=source, column=first, hint="Give each column one unique name.")


def _sample(df: pd.DataFrame, mask, cols) -> list[str]:
    rows = df.loc[mask, [c for c in dict.fromkeys(cols) if c in df.columns]].head(5)  # each column once
    return [f"row {i}: " + ", ".join(f"{c}={v!r}" for c, v in r.items()) for i, r in rows.iterrows()]


def require_columns(df: pd.DataFrame, required, source: str) -> None:
    missing = [c for c in required if c not in df.columns]
    if missing:
        import difflib
        hints = []
        for m in missing:
            close = difflib.get_close_matches(m, [str(c) for c in df.columns], n=1, cutoff=0.6)
            hints.append(f"'{m}'" + (f" (did you mean '{close[0]}'?)" if close else ""))
        raise InputError(f"missing required column(s) {', '.join(hints)}. Columns present: "
                         f"{', '.join(map(str, df.columns))}.", source=source, column=missing[0],
                         hint="Rename the column or fix the export.")


def normalize_ids(df: pd.DataFrame, column: str, source: str, intake: Intake) -> pd.Series:
    """Cast an id column to non-empty strings; nulls and empty ids are errors."""
    s = df[column]
    typed = isinstance(s.dtype, pd.StringDtype) or pd.api.types.is_numeric_dtype(s)  # holds no odd values
    odd = None if typed else s.map(lambda v: isinstance(v, (bytes, bytearray, dict, list, tuple, set, np.ndarray)))
    if odd is not None and odd.any():
        kinds = sorted({type(v).__name__ for v in s[odd]})
        raise InputError(f"{int(odd.sum())} id(s) that are {'/'.join(kinds)} values, not text or integers.",
                         source=source, column=column, sample=_sample(df, odd, [column]),
                         hint="Ids must be text or integers; flatten or convert the column upstream.")
    if pd.api.types.is_bool_dtype(s):
        raise InputError("booleans are not ids.", source=source, column=column,
                         sample=_sample(df, s.index[:3], [column]), hint="Give text or integer ids.")
    if pd.api.types.is_float_dtype(s) and s.notna().all() and (s == np.floor(s)).all():
        s = s.astype("int64")
    if pd.api.types.is_integer_dtype(s):
        intake.note(f"column '{column}' holds integers; cast to strings")
        s = s.astype(str)
    bad = s.isna()
    if bad.any():
        raise InputError(f"{int(bad.sum())} null id(s).", source=source, column=column,
                         sample=_sample(df, bad, [column, *INTERACTIONS_REQUIRED]),
                         hint="Every row needs an id; fix or remove these rows upstream.")
    s = s.astype("str")  # pandas' Arrow-backed text: the checks below and the hand-over to Arrow stay in C
    empty = s.str.strip() == ""
    if empty.any():
        raise InputError(f"{int(empty.sum())} empty id(s).", source=source, column=column,
                         sample=_sample(df, empty, [column, *INTERACTIONS_REQUIRED]),
                         hint="Every row needs a non-empty id.")
    return s


_TZ_SUFFIX = r"(?:[Zz]|[+-]\d\d(?::?\d\d)?)$"
_EPOCH_MIN_US = 0.0                      # 1970-01-01
_EPOCH_MAX_US = 4_102_444_800 * 1e6      # 2100-01-01


def _localize(ts: pd.Series, zone: str, df: pd.DataFrame, column: str, source: str) -> pd.Series:
    """Naive times in ``zone``; a time that does not exist there (a DST gap) or exists twice (an
    overlap) is an input error naming the rows."""
    try:
        return ts.dt.tz_localize(zone, ambiguous="raise", nonexistent="raise")
    except Exception:  # pytz/zoneinfo raise several classes for gaps and overlaps
        gap = ts.dt.tz_localize(zone, ambiguous="NaT", nonexistent="NaT").isna() & ts.notna()
        raise InputError(f"{int(gap.sum())} naive time(s) that do not exist, or exist twice, in {zone} (a "
                         "daylight-saving change).", source=source, column=column,
                         sample=_sample(df, gap.reindex(df.index, fill_value=False), [column]),
                         hint="Write these times with an explicit offset (e.g. '+01:00') or in UTC.") from None


def normalize_timestamps(df: pd.DataFrame, column: str, source: str, cfg: InputConfig) -> pd.Series:
    """Return ``column`` as UTC timestamps truncated to microseconds."""
    s = df[column]
    if pd.api.types.is_bool_dtype(s):
        raise InputError("booleans are not timestamps.", source=source, column=column)
    if (s.dtype == object or pd.api.types.is_string_dtype(s)) and s.notna().all() and \
            s.astype(str).str.fullmatch(r"\s*-?\d+\s*").all():
        s = s.astype(str).str.strip().astype("int64")  # integer epochs written as text (CSV)
    if pd.api.types.is_numeric_dtype(s) and not pd.api.types.is_datetime64_any_dtype(s):
        if cfg.epoch_unit is None:
            raise InputError("integer epoch timestamps need an explicit unit.", source=source,
                             column=column, sample=_sample(df, s.index[:3], [column]),
                             hint="Set input.epoch_unit to 's', 'ms', 'us' or 'ns'.")
        if s.isna().any() or not np.isfinite(s.astype(float)).all():
            bad = s.isna() | ~np.isfinite(s.astype(float))
            raise InputError("null or non-finite epoch.", source=source, column=column,
                             sample=_sample(df, bad, [column]))
        per_us = {"s": 1e6, "ms": 1e3, "us": 1.0, "ns": 1e-3}[cfg.epoch_unit]
        approx = s.astype("float64") * per_us  # range check first: no integer overflow, no silent wrap
        out_of_range = (approx < _EPOCH_MIN_US) | (approx >= _EPOCH_MAX_US)
        if out_of_range.any():
            raise InputError(f"{int(out_of_range.sum())} epoch value(s) read as '{cfg.epoch_unit}' fall outside "
                             "1970-2100.", source=source, column=column, sample=_sample(df, out_of_range, [column]),
                             hint="Check input.epoch_unit: values this far off usually mean seconds read as "
                                  "milliseconds or the other way round.")
        if pd.api.types.is_integer_dtype(s):
            v = s.astype("int64")
            micros = v // 1000 if cfg.epoch_unit == "ns" else v * {"s": 1_000_000, "ms": 1_000, "us": 1}[cfg.epoch_unit]
        else:
            micros = np.floor(approx).astype("int64")
        return pd.Series(pd.to_datetime(micros, unit="us", utc=True), index=s.index).astype(
            "datetime64[us, UTC]")
    if pd.api.types.is_datetime64_any_dtype(s):
        ts = s
    else:
        if s.isna().any():
            raise InputError(f"{int(s.isna().sum())} null timestamp(s).", source=source, column=column,
                             sample=_sample(df, s.isna(), [*INTERACTIONS_REQUIRED]),
                             hint="Every interaction needs a time.")
        text = s.astype(str).str.strip()
        unparsable = pd.to_datetime(text, format="ISO8601", errors="coerce", utc=True).isna()
        if unparsable.any():
            raise InputError(f"{int(unparsable.sum())} unparsable timestamp(s).", source=source,
                             column=column, sample=_sample(df, unparsable, [column]),
                             hint="Use ISO 8601 text, e.g. '2026-03-01T10:00:00Z'.")
        aware = text.str.contains(_TZ_SUFFIX, regex=True)
        if (~aware).any() and cfg.timezone is None:
            raise InputError("naive timestamps (no timezone) and no timezone configured.",
                             source=source, column=column, sample=_sample(df, ~aware, [column]),
                             hint="Write timestamps with an offset (e.g. '2026-03-01T10:00:00Z') or "
                                  "set input.timezone.")
        parsed = pd.Series(pd.NaT, index=s.index, dtype="datetime64[us, UTC]")
        for mask, utc in ((aware, True), (~aware, False)):
            if mask.any():
                part = pd.to_datetime(text[mask], format="ISO8601", utc=utc)
                if not utc:
                    part = _localize(part, cfg.timezone, df, column, source)
                parsed[mask] = part.dt.tz_convert("UTC").astype("datetime64[us, UTC]")
        ts = parsed
    if ts.isna().any():
        raise InputError(f"{int(ts.isna().sum())} null timestamp(s).", source=source, column=column,
                         sample=_sample(df, ts.isna(), [*INTERACTIONS_REQUIRED]))
    if ts.dt.tz is None:
        if cfg.timezone is None:
            raise InputError("naive timestamps (no timezone) and no timezone configured.",
                             source=source, column=column, sample=_sample(df, ts.index[:3], [column]),
                             hint="Store timestamps with a timezone or set input.timezone.")
        ts = _localize(ts, cfg.timezone, df, column, source)
    if str(ts.dt.tz) != "UTC":
        ts = ts.dt.tz_convert("UTC")
    if getattr(ts.dtype, "unit", "ns") == "ns":  # coarser units are whole microseconds already
        ts = ts.dt.floor("us")
    return ts.astype("datetime64[us, UTC]")


def normalize_interactions(df: pd.DataFrame, cfg: InputConfig | None = None,
                           source: str = "interactions") -> tuple[pd.DataFrame, Intake]:
    """Validate and normalise an interactions table; returns it with an :class:`Intake` report."""
    cfg = cfg or InputConfig()
    intake = Intake(source=source, rows_in=len(df))
    if len(df) == 0:
        raise InputError("the table has no rows.", source=source, hint="Give a non-empty table.")
    _duplicate_columns(df.columns, source)
    require_columns(df, INTERACTIONS_REQUIRED, source)
    out = pd.DataFrame(index=df.index)
    out["user_id"] = normalize_ids(df, "user_id", source, intake)
    out["item_id"] = normalize_ids(df, "item_id", source, intake)
    out["ts"] = normalize_timestamps(df, "ts", source, cfg)
    if "engagement" in df.columns:
        if pd.api.types.is_bool_dtype(df["engagement"]):
            raise InputError("engagement holds booleans; it must be a number (the reward before shaping).",
                             source=source, column="engagement",
                             sample=_sample(df, df.index[:3], ["user_id", "item_id", "engagement"]),
                             hint="Cast it to numbers (e.g. 1.0 for true, 0.0 for false) if that is what it means.")
        eng = pd.to_numeric(df["engagement"], errors="coerce")
        bad = eng.isna() | ~np.isfinite(eng.astype(float).fillna(np.nan))
        if bad.any():
            raise InputError(f"{int(bad.sum())} null, NaN, infinite or non-numeric engagement value(s).",
                             source=source, column="engagement",
                             sample=_sample(df, bad, ["user_id", "item_id", "ts", "engagement"]),
                             hint="Engagement must be a finite number; drop the column for 1.0 everywhere.")
        huge = eng.abs() > _ENGAGEMENT_MAX
        if huge.any():
            raise InputError(f"{int(huge.sum())} engagement value(s) beyond +-1e300: the shaped reward would "
                             "overflow to infinity.", source=source, column="engagement",
                             sample=_sample(df, huge, ["user_id", "item_id", "ts", "engagement"]),
                             hint="Rescale engagement to an ordinary range.")
        out["engagement"] = eng.astype("float64")
    else:
        out["engagement"] = 1.0
        intake.note("no 'engagement' column: every interaction counts as 1.0")
    for col in ("event_id", "event_type", "arm"):
        if col in df.columns:
            s = df[col]
            if pd.api.types.is_integer_dtype(s):
                intake.note(f"column '{col}' holds integers; cast to strings")
            if isinstance(s.dtype, pd.StringDtype) or pd.api.types.is_integer_dtype(s):
                out[col] = s.astype("str")
            else:  # mixed Python values: each one rendered, missing ones kept missing
                out[col] = s.map(lambda v: None if v is None or (isinstance(v, float) and math.isnan(v))
                                 else str(v)).astype("str")
        else:  # all missing, as text (an Arrow-backed column: no Python object per row)
            out[col] = pa.nulls(len(df), pa.large_string()).to_pandas(
                types_mapper={pa.large_string(): pd.StringDtype("pyarrow", na_value=np.nan)}.get).array
    out = out.reset_index(drop=True)
    intake.rows_out = len(out)
    return out, intake


def normalize_items(df: pd.DataFrame, text_columns=("title", "description", "tags"),
                    source: str = "items", category: str | None = None) -> tuple[pd.DataFrame, Intake]:
    """Validate an items snapshot: unique non-empty ids, at least one text column."""
    intake = Intake(source=source, rows_in=len(df))
    if len(df) == 0:
        raise InputError("the table has no rows.", source=source, hint="Give a non-empty table.")
    require_columns(df, ITEMS_REQUIRED, source)
    present = [c for c in text_columns if c in df.columns]
    if not present and category is None:
        raise InputError(f"none of the text columns {list(text_columns)} is present. Columns present: "
                         f"{', '.join(map(str, df.columns))}.", source=source, column=text_columns[0],
                         hint="Add a text column or set taxonomy.text_columns.")
    out = df.copy()
    out["item_id"] = normalize_ids(df, "item_id", source, intake)
    dup = out["item_id"].duplicated(keep=False)
    if dup.any():
        raise InputError(f"{int(out['item_id'][dup].nunique())} duplicate item id(s); an items table is "
                         "a snapshot with one row per item.", source=source, column="item_id",
                         sample=_sample(out, dup, ["item_id", *present]),
                         hint="Keep the latest row per item before labelling.")
    for c in present:
        col = out[c]
        if col.map(lambda v: isinstance(v, bytes)).any():
            col = col.map(lambda v: v.decode("utf-8", errors="replace") if isinstance(v, bytes) else v)
            intake.note(f"column '{c}' held bytes; decoded as UTF-8 with replacement")
        col = col.map(lambda v: " ".join(map(str, v)) if isinstance(v, (list, tuple, np.ndarray)) else v)
        out[c] = col.fillna("").astype(str)
    for c in text_columns:
        if c not in out.columns:
            intake.note(f"text column '{c}' absent; treated as empty")
    intake.rows_out = len(out)
    return out.reset_index(drop=True), intake


def item_text(items: pd.DataFrame, text_columns) -> pd.Series:
    """The text an item is embedded and named from: its text columns joined."""
    cols = [c for c in text_columns if c in items.columns]
    if not cols:
        return pd.Series([""] * len(items), index=items.index)
    text = items[cols[0]].astype(str)
    for c in cols[1:]:
        text = text.str.cat(items[c].astype(str), sep=". ")
    return text.str.replace(r"\s+", " ", regex=True).str.strip(" .")

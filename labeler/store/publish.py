"""Publishing snapshots: shards written in parallel, unchanged ones hard-linked, pointer switched last.

A full publish writes every shard whose content changed. A publish of the users that changed
(``changed_users``, the job's daily path) writes, per shard holding such users, one small delta
layer with just their rows, and hard-links the shard's base file and earlier layers; readers look
a user up in the newest layer that holds them. A shard whose layers would pass ``max_layers``, or
hold more rows than ``compact_share`` of its base, is compacted: its layers are merged into a new
base file. So a day's publish costs what the day changed, and a lookup stays a few B-tree probes.
"""
from __future__ import annotations

import datetime as dt
import hashlib
import json
import logging
import os
import shutil
import sqlite3
import uuid
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from ..config import LabelConfig
from ..errors import InputError
from ..labels.intake import rank_item_topics
from ..version import __version__
from .layout import FORMAT, PAGE_SIZE, check_file, clean, current_name, file_record, fsync_dir, read_manifest, \
    shard_of, to_us, tombstones, user_digest

log = logging.getLogger(__name__)


def publish_store(path, footprints, taxonomy, config: LabelConfig | None = None, *,
                  history: pd.DataFrame | None = None, as_of=None, shards: int = 16,
                  retain: int = 3, workers: int | None = None, changed_users=None,
                  compact_share: float = 0.5, max_layers: int = 8, content_key: str | None = None,
                  partial_users=None, before_switch=None) -> str:
    """Publish a new store snapshot from a footprints table; returns the snapshot name.

    ``footprints`` is what :func:`labeler.build_footprints` returns (or a :class:`LabelRun`, an
    Arrow table with the same columns, or a Parquet file of them, such as a job generation's
    ``footprints.parquet``; ``history`` likewise). Its ``history_len`` and ``recent_us`` columns let lookups
    apply ``warmup`` and memory windows; ``history`` (user_id, history_len) adds users whose every
    interaction was unplaced. Shards compacted from their files are merged in parallel by
    ``workers`` threads (default: one per core); rows from Python are inserted by one thread.

    ``changed_users``: the only users whose rows differ from the current snapshot's (every other
    user's rows are as published before; lookups age them to the new watermark). When the current
    snapshot has this format, shard count, taxonomy and settings, only those users' rows are
    written, as delta layers; otherwise the publish is full and the tables must hold everyone.

    ``partial_users``: of the changed users, those for whom ``footprints`` holds only the topic
    rows that changed (the job's continued users: topics met since the last watermark) and
    ``history`` their new history length; their other topic rows stay as published. Needs a
    layered publish (see :func:`publishes_layered`).

    ``content_key``: a name for exactly what is being published (the job's: its inputs, settings
    and the snapshot it builds on). When the current snapshot was published under the same key,
    nothing is written and its name is returned, so a run redone after a crash that followed its
    publish leaves the store as a clean run would; the key also names the snapshot folder.

    ``before_switch``: called once the snapshot's files are written, before it becomes current;
    if it raises, the current snapshot stays current (the job publishes while it writes its
    outputs, and switches only once they are written).
    """
    from ..labels.plan import LabelRun
    cfg = config or LabelConfig()
    if isinstance(footprints, LabelRun):
        run = footprints
        as_of = as_of if as_of is not None else pd.Timestamp(run.as_of_us, unit="us", tz="UTC")
        footprints = run.footprints_frame()
        history = run.history_frame() if history is None else history
    root = Path(path)
    previous = _current_manifest(root)
    if content_key is not None and previous is not None and previous.get("content_key") == content_key:
        log.info("store snapshot %s already holds this publish (content key %s); nothing written",
                 previous["name"], content_key[:12])
        return previous["name"]
    layered = changed_users is not None and _layerable(previous, shards, taxonomy, cfg)
    only = _ids(changed_users) if layered else None
    partial = _ids(partial_users or ())
    if len(partial) and not layered:
        raise InputError("partial_users needs a layered publish (the current snapshot must have this format, shard "
                         "count, taxonomy and settings); publish every row of every user instead.",
                         source=str(path), column="partial_users")
    fp = _arrow(footprints, only)
    missing = [c for c in ("user_id", "level", "topic_id", "interactions", "known", "history_len",
                           "recent_us", "last_ts") if c not in fp.column_names]
    if missing:
        raise InputError(f"missing column(s) {missing}: publish a table from labeler.build_footprints "
                         "or a LabelRun.", source="footprints", column=missing[0])
    (root / "snapshots").mkdir(parents=True, exist_ok=True)
    gone = tombstones(root)
    fp = _without_tombstoned(fp, gone)
    users = fp.group_by("user_id").aggregate([("history_len", "max")]).rename_columns(["user_id", "history_len"])
    users = users.select(["user_id", "history_len"]).cast(pa.schema([("user_id", pa.string()), ("history_len", pa.int64())]))
    if history is not None:
        h = _without_tombstoned(_arrow(history, only), gone).select(["user_id", "history_len"])
        h = h.cast(users.schema)
        users = pa.concat_tables([users, h.filter(pc.invert(pc.is_in(h.column("user_id"), value_set=users.column("user_id"))))])
    last = pc.max(fp.column("last_ts")).as_py() if fp.num_rows else None
    watermark = to_us(as_of) if as_of is not None else to_us(last) if last is not None else None

    seq = (previous["sequence"] + 1) if previous else 1
    name = f"snap-{seq:06d}-{(content_key or uuid.uuid4().hex)[:8]}"
    tmp = root / "snapshots" / f".{name}.tmp"
    for leftover in (tmp, root / "snapshots" / name):  # of a publish of this key that crashed before its switch
        shutil.rmtree(leftover, ignore_errors=True)
    tmp.mkdir()
    items_digest = _items(tmp / "items.sqlite", taxonomy, previous, root)
    topics, people = _shard_rows(fp, users, partial)
    del fp, users  # the shards' rows are copies: whatever was copied on the way can go now
    n_users, n_rows = people.num_rows, topics.num_rows
    pieces = _by_shard(topics, people, shards)
    del topics, people
    if layered:
        plan = _plan_layers(root / "snapshots" / previous["name"], previous, tmp, seq, pieces, compact_share,
                            max_layers)
    else:
        plan = _plan_full(root, previous, tmp, shards, pieces)
    shard_info, deltas, to_write, rewritten = plan
    merges = [job for job in to_write if len(job) > 3]
    with ThreadPoolExecutor(max_workers=max(1, min(workers or os.cpu_count() or 1, len(merges) or 1))) as pool:
        futures = [pool.submit(_write_shard, *job) for job in merges]
        for job in to_write:
            # rows inserted from Python hold the interpreter lock for each row: two threads doing it
            # only contend (a full publish took 42.5 s on two threads, 28.2 s on one), so they run
            # here, one shard after another, while the merges run inside SQLite, in the pool
            if len(job) == 3:
                _write_shard(*job)
        for fut in futures:
            fut.result()  # re-raises a failed write before anything is published
        files = _file_records(tmp, previous and root / "snapshots" / previous["name"], previous, pool)
    for fname, info in shard_info.items():
        if info.get("users") is None:  # compacted: count what the merge kept
            con = sqlite3.connect(f"file:{tmp / fname}?mode=ro", uri=True)
            info["users"], info["rows"] = (con.execute(f"SELECT count(*) FROM {t}").fetchone()[0]
                                           for t in ("users", "topics"))
            con.close()
            info["new_users"] = info["users"] - info.pop("users_before")
    manifest = {"format": FORMAT, "name": name, "sequence": seq, "tool_version": __version__,
                "created": dt.datetime.now(dt.timezone.utc).isoformat(), "watermark_us": watermark,
                "taxonomy_version": taxonomy.version, "config": json.loads(cfg.canonical_json()),
                "items_digest": items_digest, "files": files, "n_shards": shards, "shards": shard_info, "deltas": deltas,
                "users": (previous["users"] + sum(v["new_users"] for v in shard_info.values())) if layered
                else n_users,
                "publish": "changed users as delta layers" if layered else "full", "content_key": content_key,
                "rewritten_shards": rewritten}
    (tmp / "manifest.json").write_text(json.dumps(manifest, indent=2, sort_keys=True) + "\n")
    for f in tmp.iterdir():
        with open(f, "rb") as fh:
            os.fsync(fh.fileno())
    fsync_dir(tmp)
    if before_switch is not None:
        before_switch()
    os.replace(tmp, root / "snapshots" / name)
    fsync_dir(root / "snapshots")
    pointer = root / f".CURRENT.{uuid.uuid4().hex}"
    with open(pointer, "w") as fh:
        fh.write(name + "\n")
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(pointer, root / "CURRENT")
    fsync_dir(root)
    clean(root, keep=retain)
    log.info("published store snapshot %s (%s): %d users and %d footprint rows written to %d files", name,
             manifest["publish"], n_users, n_rows, len(rewritten))
    return name


def _file_records(tmp: Path, prev_dir: Path | None, previous: dict | None, pool) -> dict:
    """Size and SHA-256 of every file of the new snapshot; a file linked from the previous one keeps
    its record, so a publish reads only the files it wrote."""
    known = (previous or {}).get("files", {})
    records, fresh = {}, []
    for f in sorted(p.name for p in tmp.iterdir()):
        if f in known and prev_dir is not None and (prev_dir / f).exists() and os.path.samefile(tmp / f, prev_dir / f):
            records[f] = known[f]
        else:
            fresh.append(f)
    for f, rec in zip(fresh, pool.map(lambda f: file_record(tmp / f), fresh)):
        records[f] = rec
    return dict(sorted(records.items()))


def _current_manifest(root: Path) -> dict | None:
    """The manifest of the store's current snapshot, of any format; None before the first publish."""
    return read_manifest(root, current_name(root), any_format=True) if (root / "CURRENT").exists() else None


def publishes_layered(path, shards: int, taxonomy, config: LabelConfig) -> bool:
    """Whether a publish with ``changed_users`` into the store at ``path`` would write delta layers
    (and so needs only the changed users' rows), rather than every user's."""
    root = Path(path)
    previous = _current_manifest(root)
    return _layerable(previous, shards, taxonomy, config)


def _arrow(table, only: pa.Array | None) -> pa.Table:
    """An Arrow table of an Arrow table, a pandas frame or a Parquet file, cut to the users ``only``
    when given."""
    if isinstance(table, (str, Path)):
        import pyarrow.dataset as ds
        data = ds.dataset(table, format="parquet")
        table = data.to_table(filter=None if only is None else ds.field("user_id").isin(only))
    if not isinstance(table, pa.Table):
        table = pa.Table.from_pandas(table, preserve_index=False)
    table = table.set_column(table.schema.get_field_index("user_id"), "user_id",
                             pc.cast(table.column("user_id"), pa.string()))
    if only is not None:
        keep = pc.is_in(table.column("user_id"), value_set=only)
        if pc.sum(keep).as_py() != table.num_rows:  # filtering every row in would only copy them
            table = table.filter(keep)
    return table


def _ids(values) -> pa.Array:
    """User ids as an Arrow string array (an Arrow array is taken as it is, without a Python copy)."""
    if isinstance(values, (pa.Array, pa.ChunkedArray)):
        return pc.cast(values, pa.string())
    return pa.array([str(u) for u in values], pa.string())


def _without_tombstoned(table: pa.Table, gone: set[str]) -> pa.Table:
    if not gone or table.num_rows == 0:
        return table
    ids = pc.unique(table.column("user_id"))
    erased = pa.array([u for u in ids.to_pylist() if user_digest(u) in gone], pa.string())
    return table.filter(pc.invert(pc.is_in(table.column("user_id"), value_set=erased)))


def _layerable(previous: dict | None, shards: int, taxonomy, cfg: LabelConfig) -> bool:
    """Whether a publish of the changed users can be layered onto the current snapshot."""
    return (previous is not None and previous.get("format") == FORMAT and previous["n_shards"] == shards
            and previous["taxonomy_version"] == taxonomy.version
            and previous["config"] == json.loads(cfg.canonical_json()))


def _plan_full(root: Path, previous: dict | None, tmp: Path, shards: int, pieces: list):
    """Every shard from the complete tables; one with the previous digest and no layers is linked."""
    shard_info, to_write, rewritten = {}, [], []
    for k, (t_k, u_k) in enumerate(pieces):
        digest = _shard_digest(t_k, u_k)
        fname = f"users-{k:02d}.sqlite"
        prev = (previous or {}).get("shards", {}).get(fname)
        if prev and prev["digest"] == digest and previous["n_shards"] == shards and previous["format"] == FORMAT \
                and not previous.get("deltas", {}).get(fname):
            os.link(root / "snapshots" / previous["name"] / fname, tmp / fname)
        else:
            to_write.append((tmp / fname, t_k, u_k))
            rewritten.append(fname)
        shard_info[fname] = {"digest": digest, "users": u_k.num_rows, "rows": t_k.num_rows}
    return shard_info, {}, to_write, rewritten


def _plan_layers(prev_dir: Path, previous: dict, tmp: Path, seq: int, pieces: list, compact_share: float,
                 max_layers: int):
    """Per shard: linked as it was, a delta layer of its changed users on top, or compacted.

    A shard's ``users`` and ``rows`` count its base file; ``layer_users`` and ``layer_rows`` its
    delta layers together; ``new_users`` how many changed users the snapshot did not hold before.
    A shard is compacted when its layers would pass ``max_layers`` or hold more rows (topic rows
    and user rows) than ``compact_share`` of its base. Compacting merges the base, the layers and
    the changed users' rows into a new base inside SQLite (see :func:`_write_shard`), so it costs
    a copy, not a re-encoding of every row.
    """
    shard_info, deltas, to_write, rewritten = {}, {}, [], []
    for k, (t_k, u_k) in enumerate(pieces):
        fname = f"users-{k:02d}.sqlite"
        info = dict(previous["shards"][fname])
        layers = list(previous.get("deltas", {}).get(fname, []))
        sources = [prev_dir / f for f in [fname, *layers]]
        in_layers = info.get("layer_users", 0) + u_k.num_rows
        if u_k.num_rows == 0:
            info["new_users"] = 0
        elif len(layers) + 1 > max_layers or \
                info.get("layer_rows", 0) + t_k.num_rows + in_layers > compact_share * max(info["rows"] + info["users"], 1):
            for f in sources:  # read whole by the merge: a damaged file must not be carried forward
                check_file(f, previous["files"].get(f.name))
            before = info["users"] + info.get("layer_users", 0) - info.get("layer_repeats", 0)
            to_write.append((tmp / fname, t_k, u_k, sources))
            rewritten.append(fname)
            info = {"digest": None, "users": None, "rows": None, "new_users": None, "users_before": before}
            layers = []
        else:
            held = _held(sources, u_k.column("user_id"))
            layer = f"users-{k:02d}.d{seq:06d}.sqlite"
            to_write.append((tmp / layer, t_k, u_k))
            rewritten.append(layer)
            layers.append(layer)
            info.update(layer_users=in_layers, layer_rows=info.get("layer_rows", 0) + t_k.num_rows,
                        layer_repeats=info.get("layer_repeats", 0) + held, new_users=u_k.num_rows - held)
        for f in [fname, *layers]:
            if f not in rewritten:  # the files kept as they were
                os.link(prev_dir / f, tmp / f)
        shard_info[fname] = info
        if layers:
            deltas[fname] = layers
    return shard_info, deltas, to_write, rewritten


def _held(files: list[Path], user_ids: pa.Array) -> int:
    """How many of ``user_ids`` the shard files hold already."""
    found: set[str] = set()
    ids = user_ids.to_pylist()
    # the ids as one JSON parameter, unpacked inside SQLite: twice as fast as inserting them into a
    # temporary table one by one, which stays for ids holding a NUL (JSON text would cut them there)
    as_json = not pc.any(pc.match_substring(user_ids, "\x00")).as_py()
    for f in files:
        con = sqlite3.connect(f"file:{f}?mode=ro&immutable=1", uri=True)
        try:
            if as_json:
                found |= {r[0] for r in con.execute("SELECT u.user_id FROM json_each(?) q JOIN users u "
                                                    "ON u.user_id = q.value", (json.dumps(ids, ensure_ascii=False),))}
            else:
                con.execute("CREATE TEMP TABLE q (user_id TEXT PRIMARY KEY) WITHOUT ROWID")
                con.executemany("INSERT INTO q VALUES (?)", [(u,) for u in ids])
                found |= {r[0] for r in con.execute("SELECT q.user_id FROM q JOIN users USING (user_id)")}
        finally:
            con.close()
    return len(found)


def read_shard(path: Path) -> tuple[pd.DataFrame, pd.DataFrame]:
    """(footprint rows, users) of one shard file, in the shape ``publish_store`` takes."""
    con = sqlite3.connect(f"file:{path}?mode=ro&immutable=1", uri=True)
    try:
        fp = pd.read_sql_query("SELECT * FROM topics", con)
        users = pd.read_sql_query("SELECT * FROM users", con)
    finally:
        con.close()
    fp = fp.rename(columns={"first_us": "first_ts", "last_us": "last_ts", "known_since_us": "known_since"})
    for c in ("first_ts", "last_ts", "known_since"):
        fp[c] = pd.to_datetime(fp[c], unit="us", utc=True)
    fp["recent_us"] = fp.pop("recent").map(json.loads)
    fp["known"] = fp["known"].astype(bool)
    return fp, users


def merge_layers(layers: list[tuple[pd.DataFrame, pd.DataFrame]]) -> tuple[pd.DataFrame, pd.DataFrame]:
    """One shard's rows from its layers, oldest first, as a reader sees them: each user's history
    from the newest layer holding the user, each topic row from the newest layer holding it among
    those from the user's newest whole layer on (``whole`` = 0: the layer has only changed rows)."""
    users = pd.concat([u[["user_id", "history_len", "whole"]].assign(_layer=i) for i, (_, u) in enumerate(layers)],
                      ignore_index=True)
    whole = users[users["whole"] == 1].groupby("user_id")["_layer"].max()
    users = users.sort_values("_layer", kind="stable").drop_duplicates("user_id", keep="last")
    fp = pd.concat([f.drop(columns=[c for c in f.columns if c.startswith("_")]).assign(_layer=i)
                    for i, (f, _) in enumerate(layers)], ignore_index=True)
    fp = fp[fp["_layer"].to_numpy() >= fp["user_id"].map(whole).fillna(0).to_numpy()]
    fp = fp.sort_values("_layer", kind="stable").drop_duplicates(["user_id", "level", "topic_id"], keep="last")
    fp = fp.drop(columns=["_layer", "history_len"]).merge(users[["user_id", "history_len"]], on="user_id", how="left")
    return (fp.sort_values(["user_id", "level", "topic_id"]).reset_index(drop=True),
            users.drop(columns=["_layer", "whole"]).sort_values("user_id").reset_index(drop=True))


TOPIC_COLUMNS = ("user_id", "level", "topic_id", "interactions", "engaged_interactions", "known", "first_us",
                 "last_us", "known_since_us", "recent", "history_len")


def _us(column, n: int) -> pa.Array:
    """Timestamps as int64 microseconds (null stays null); a missing column is all null."""
    if column is None or pa.types.is_null(column.type):
        return pa.nulls(n, pa.int64())
    if not pa.types.is_timestamp(column.type):
        column = pa.array(pd.to_datetime(pd.Series(column.to_pandas()), utc=True).astype("datetime64[us, UTC]"))
    return pc.cast(pc.cast(column, pa.timestamp("us", tz="UTC"), safe=False), pa.int64())


def _recent_text(values) -> pa.Array:
    """The last qualifying times as JSON arrays ("[1, 2]"), built column-wise."""
    arr = values if isinstance(values, (pa.Array, pa.ChunkedArray)) else pa.array(list(values), pa.list_(pa.int64()))
    text = pc.binary_join(pc.cast(arr, pa.list_(pa.string())), ", ")
    return pc.binary_join_element_wise("[", pc.fill_null(text, ""), "]", "")


def _shard_rows(fp: pa.Table, users: pa.Table, partial: pa.Array) -> tuple[pa.Table, pa.Table]:
    """(topic rows, users) as Arrow tables in the shards' column layout (in no order: ``_by_shard``
    sorts them).
    ``whole`` is 0 for the users in ``partial`` (their rows only overlay older ones), else 1."""
    people = pa.table({"user_id": users.column("user_id"),
                       "history_len": pc.fill_null(pc.cast(users.column("history_len"), pa.int64()), 0),
                       "whole": pc.cast(pc.invert(pc.is_in(users.column("user_id"), value_set=partial)), pa.int64())})
    n = fp.num_rows
    col = lambda name: fp.column(name) if name in fp.column_names else None  # noqa: E731
    user_id = fp.column("user_id")
    topics = pa.table({
        "user_id": user_id, "level": pc.cast(fp.column("level"), pa.int64()),
        "topic_id": pc.cast(fp.column("topic_id"), pa.string()),
        "interactions": pc.cast(fp.column("interactions"), pa.int64()),
        "engaged_interactions": pc.cast(col("engaged_interactions") or fp.column("interactions"), pa.int64()),
        "known": pc.cast(pc.cast(fp.column("known"), pa.bool_()), pa.int64()),
        "first_us": _us(col("first_ts") or fp.column("last_ts"), n), "last_us": _us(fp.column("last_ts"), n),
        "known_since_us": _us(col("known_since"), n),
        "recent": _recent_text(pc.cast(fp.column("recent_us"), pa.list_(pa.int64()))),
        "history_len": people.column("history_len").take(pc.index_in(user_id, value_set=people.column("user_id")))})
    return topics, people


def _by_shard(topics: pa.Table, people: pa.Table, shards: int) -> list[tuple[pa.Table, pa.Table]]:
    """Each shard's (topic rows, users), in key order: slices of one sorted copy of each table
    (ordered by key, then stably by shard), not a sorted copy and then a filtered one per shard."""
    ids = people.column("user_id").to_pylist()
    shard = np.fromiter((shard_of(u, shards) for u in ids), dtype=np.int64, count=len(ids))
    at = pc.index_in(topics.column("user_id"), value_set=people.column("user_id"))
    topic_shard = shard[at.to_numpy(zero_copy_only=False)] if len(at) else np.zeros(0, np.int64)
    pieces = []
    for table, of, keys in ((topics, topic_shard, ["user_id", "level", "topic_id"]), (people, shard, ["user_id"])):
        by_key = pc.sort_indices(table, [(k, "ascending") for k in keys]).to_numpy()
        order = by_key[np.argsort(of[by_key], kind="stable")]
        table = table.take(pa.array(order))
        ends = np.searchsorted(of[order], np.arange(shards + 1))
        pieces.append([table.slice(ends[k], ends[k + 1] - ends[k]) for k in range(shards)])
    return list(zip(*pieces))


def _shard_digest(topics: pa.Table, people: pa.Table) -> str:
    """Order-independent content hash of one shard's rows (sum of pandas' 64-bit row hashes)."""
    rows = pd.util.hash_pandas_object(topics.to_pandas(), index=False).to_numpy(np.uint64)
    urows = pd.util.hash_pandas_object(people.to_pandas(), index=False).to_numpy(np.uint64)
    total = (int(rows.sum(dtype=np.uint64)), int(urows.sum(dtype=np.uint64)), len(rows), len(urows))
    return hashlib.sha256(repr(total).encode()).hexdigest()


_SCHEMA = f"""
    PRAGMA page_size = {PAGE_SIZE}; PRAGMA journal_mode = OFF; PRAGMA synchronous = OFF;
    CREATE TABLE users (user_id TEXT PRIMARY KEY, history_len INTEGER NOT NULL, whole INTEGER NOT NULL)
        WITHOUT ROWID;
    CREATE TABLE topics (user_id TEXT NOT NULL, level INTEGER NOT NULL, topic_id TEXT NOT NULL,
        interactions INTEGER, engaged_interactions INTEGER, known INTEGER, first_us INTEGER,
        last_us INTEGER, known_since_us INTEGER, recent TEXT, history_len INTEGER NOT NULL,
        PRIMARY KEY (user_id, level, topic_id)) WITHOUT ROWID;"""


def _write_shard(path: Path, topics: pa.Table, people: pa.Table, merge: list[Path] = ()) -> None:
    """One shard file: ``users`` (every user, for those without topic rows) and ``topics``,
    clustered by user id. Each topic row repeats the user's history length, so that a lookup is
    one range read in one B-tree. With 16 KiB pages a shard of 62,500 users x 20 topics is a
    three-level tree with 34 interior pages, soon cached, so a cold lookup reads about one page.

    In a delta layer a user with ``whole`` = 0 has only the topic rows that changed; their other
    rows are those of the older files. With ``merge`` (a shard's files, oldest first: its base,
    then its layers) the new file is the shard as a reader sees it with ``topics``/``people`` on
    top: each user's history from the newest source holding them, each topic row from the newest
    source holding it among those from the user's newest whole source on. Rows are inserted in
    key order, so the file is as compact as one written from scratch.
    """
    con = sqlite3.connect(path)
    con.executescript(_SCHEMA)
    users = zip(*(people.column(c).to_pylist() for c in ("user_id", "history_len", "whole")))
    rows = zip(*(topics.column(c).to_pylist() for c in TOPIC_COLUMNS))
    if not merge:
        con.executemany("INSERT INTO users VALUES (?, ?, ?)", users)
        con.executemany(f"INSERT INTO topics VALUES ({', '.join('?' * len(TOPIC_COLUMNS))})", rows)
        con.commit()
        con.close()
        return
    new = len(merge)  # source numbers: 0 the base, 1.. the layers, ``new`` the rows given here
    con.execute("ATTACH DATABASE ':memory:' AS s%d" % new)
    con.executescript(f"""CREATE TABLE s{new}.users AS SELECT * FROM main.users WHERE 0;
        CREATE TABLE s{new}.topics AS SELECT * FROM main.topics WHERE 0;
        CREATE TEMP TABLE hist (user_id TEXT PRIMARY KEY, history_len INTEGER NOT NULL) WITHOUT ROWID;
        CREATE TEMP TABLE cut (user_id TEXT PRIMARY KEY, src INTEGER NOT NULL) WITHOUT ROWID;
        CREATE TEMP TABLE picked (user_id TEXT, level INTEGER, topic_id TEXT, src INTEGER NOT NULL,
            PRIMARY KEY (user_id, level, topic_id)) WITHOUT ROWID;""")
    con.executemany(f"INSERT INTO s{new}.users VALUES (?, ?, ?)", users)
    con.executemany(f"INSERT INTO s{new}.topics VALUES ({', '.join('?' * len(TOPIC_COLUMNS))})", rows)
    for i, src in enumerate(merge):
        con.execute(f"ATTACH DATABASE ? AS s{i}", (f"file:{src}?mode=ro&immutable=1",))
    for i in range(new, 0, -1):  # newest first: the newest source wins
        con.execute(f"INSERT OR IGNORE INTO hist SELECT user_id, history_len FROM s{i}.users")
        con.execute(f"INSERT OR IGNORE INTO cut SELECT user_id, {i} FROM s{i}.users WHERE whole = 1")
        con.execute(f"INSERT OR IGNORE INTO picked SELECT t.user_id, t.level, t.topic_id, {i} FROM s{i}.topics t "
                    f"WHERE NOT EXISTS (SELECT 1 FROM cut c WHERE c.user_id = t.user_id AND c.src > {i})")
    cols = ", ".join(f"t.{c}" for c in TOPIC_COLUMNS[:-1])
    newer = " UNION ALL ".join(
        f"SELECT {cols}, h.history_len FROM s{i}.topics t JOIN picked p ON p.user_id = t.user_id "
        f"AND p.level = t.level AND p.topic_id = t.topic_id AND p.src = {i} JOIN hist h ON h.user_id = t.user_id"
        for i in range(1, new + 1))
    base = (f"SELECT {cols}, COALESCE((SELECT h.history_len FROM hist h WHERE h.user_id = t.user_id), "
            "t.history_len) FROM s0.topics t WHERE NOT EXISTS (SELECT 1 FROM cut c WHERE c.user_id = t.user_id) "
            "AND NOT EXISTS (SELECT 1 FROM picked p WHERE p.user_id = t.user_id AND p.level = t.level "
            "AND p.topic_id = t.topic_id)")
    con.execute("INSERT INTO main.users SELECT user_id, history_len, 1 FROM (SELECT user_id, history_len FROM hist "
                "UNION ALL SELECT user_id, history_len FROM s0.users u WHERE NOT EXISTS "
                "(SELECT 1 FROM hist h WHERE h.user_id = u.user_id)) ORDER BY user_id")
    con.execute(f"INSERT INTO main.topics SELECT * FROM ({base} UNION ALL {newer}) ORDER BY user_id, level, topic_id")
    con.commit()
    con.close()


def _items(path: Path, taxonomy, previous: dict | None, root: Path) -> str:
    """items.sqlite for the snapshot: linked from the previous one when the item topics are the same."""
    it = rank_item_topics(taxonomy.item_topics)
    t = taxonomy.topics
    rows = pd.util.hash_pandas_object(it[["item_id", "level", "valid_from_us", "pos", "topic_id"]].astype(str),
                                      index=False).to_numpy(np.uint64)
    trows = pd.util.hash_pandas_object(t[["topic_id", "level", "parent_id", "name"]].astype(str),
                                       index=False).to_numpy(np.uint64)
    digest = hashlib.sha256(repr((int(rows.sum(dtype=np.uint64)), len(rows), int(trows.sum(dtype=np.uint64)),
                                  len(trows))).encode()).hexdigest()
    if previous is not None and previous.get("items_digest") == digest:
        os.link(root / "snapshots" / previous["name"] / "items.sqlite", path)
    else:
        _write_items(path, it, t)
    return digest


def _write_items(path: Path, it: pd.DataFrame, t: pd.DataFrame) -> None:
    con = sqlite3.connect(path)
    con.executescript("""
        PRAGMA journal_mode = OFF; PRAGMA synchronous = OFF;
        CREATE TABLE item_topics (item_id TEXT NOT NULL, level INTEGER NOT NULL, valid_from_us INTEGER NOT NULL,
            pos INTEGER NOT NULL, topic_id TEXT, PRIMARY KEY (item_id, level, valid_from_us, pos))
            WITHOUT ROWID;
        CREATE TABLE topics (topic_id TEXT PRIMARY KEY, level INTEGER, parent_id TEXT, name TEXT) WITHOUT ROWID;""")
    con.executemany("INSERT INTO item_topics VALUES (?, ?, ?, ?, ?)",
                    zip(it["item_id"].astype(str), it["level"].astype(int).tolist(),
                        it["valid_from_us"].astype(int).tolist(), it["pos"].astype(int).tolist(),
                        [None if pd.isna(t) else str(t) for t in it["topic_id"]]))
    con.executemany("INSERT INTO topics VALUES (?, ?, ?, ?)",
                    zip(t["topic_id"].astype(str), t["level"].astype(int).tolist(),
                        [None if p is None or (isinstance(p, float) and np.isnan(p)) else str(p)
                         for p in t["parent_id"]], t["name"].astype(str)))
    con.commit()
    con.close()

"""`labeler lookup` and `labeler forget`."""
from __future__ import annotations

import dataclasses
import json

import pandas as pd

from ..store import forget_users, open_store
from ._options import add_common


def register(sub) -> None:
    p = sub.add_parser("lookup", help="a user's known topics, or how candidate items would be labelled now")
    p.add_argument("--store", required=True, help="store folder (written by `labeler label --store`)")
    p.add_argument("user", metavar="USER", help="user id")
    p.add_argument("--item", action="append", default=[], metavar="ITEM", help="candidate item id (repeatable)")
    p.add_argument("--level", type=int, help="taxonomy level (default: every level)")
    p.add_argument("--at", help="classify as if met at this time (ISO 8601, after the watermark)")
    p.add_argument("--json", action="store_true", help="print JSON instead of a table")
    add_common(p, config=False)
    p.set_defaults(run=run_lookup)
    f = sub.add_parser("forget", help="erase users from a store (and label output folders), for good")
    f.add_argument("--store", required=True, help="store folder")
    f.add_argument("users", nargs="+", metavar="USER", help="user ids to erase")
    f.add_argument("--outputs", nargs="*", default=[], metavar="DIR",
                   help="`labeler label --out` folders whose Parquet files are rewritten without these users")
    add_common(f, config=False)
    f.set_defaults(run=run_forget)


def _plain(obj):
    if isinstance(obj, pd.Timestamp):
        return obj.isoformat()
    return obj


def run_lookup(args) -> int:
    store = open_store(args.store)
    fp = store.footprint(args.user, level=args.level)
    result = None
    if args.item:
        result = store.classify(args.user, args.item, level=args.level, at=args.at)
    if args.json:
        doc = {"user_id": fp.user_id, "snapshot": fp.snapshot, "watermark": _plain(fp.watermark),
               "taxonomy_version": fp.taxonomy_version, "history_len": fp.history_len,
               "topics": [{k: _plain(v) for k, v in dataclasses.asdict(t).items()} for t in fp.topics]}
        if result is not None:
            doc["items"] = [dataclasses.asdict(c) for c in result]
        print(json.dumps(doc, indent=2))
        return 0
    if fp.history_len == 0 and not fp.topics:
        print(f"user {fp.user_id} is not in snapshot {fp.snapshot} (interactions up to {fp.watermark}): no "
              "footprint; items are labelled as for a user never seen")
    else:
        print(f"user {fp.user_id}: {len(fp.known)} known topic(s), {fp.history_len} interactions up to "
              f"{fp.watermark} (snapshot {fp.snapshot})")
    if fp.topics:
        print(f"  {'level':>5}  {'topic':<10} {'known':<6} {'interactions':>12} {'engaged':>8}  {'known since':<26} name")
        for t in fp.topics:
            print(f"  {t.level:>5}  {t.topic_id:<10} {'yes' if t.known else 'no':<6} {t.interactions:>12} "
                  f"{t.engaged_interactions:>8}  {str(t.known_since or '-'):<26} {t.name}")
    if result is not None:
        print(f"  {'item':<12} {'level':>5}  {'label':<13} topic")
        for c in result:
            print(f"  {c.item_id:<12} {c.level:>5}  {c.label:<13} {c.topic_id or '-'} {c.topic_name or ''}")
    return 0


def run_forget(args) -> int:
    """Exit 0 when every id was found and erased; 1 when any was found nowhere (nothing is
    published when none was found)."""
    done = forget_users(args.store, args.users, outputs=args.outputs)
    if done.erased:
        print(f"erased {len(done.erased)} user(s): {', '.join(done.erased)}; published {done.snapshot}, removed "
              "older snapshots" + (f", rewrote {len(args.outputs)} output folder(s)" if args.outputs else ""))
    if done.not_found:
        print(f"not found in the store or the outputs: {', '.join(done.not_found)} (check the ids; they are "
              "tombstoned all the same, so data arriving later for them is never published)"
              + ("" if done.erased else "; nothing was published"))
        return 1
    return 0

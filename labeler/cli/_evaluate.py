"""`labeler evaluate`."""
from __future__ import annotations

from pathlib import Path

from ..tables import read_table
from ..taxonomy import Taxonomy
from ._options import add_common, job_config


def register(sub) -> None:
    p = sub.add_parser("evaluate", help="accuracy, diversity, novelty, serendipity and interest growth of "
                                        "recommendation lists, on the labels' footprints")
    p.add_argument("--recs", required=True, help="recommendation lists: user_id, ts, item_id, rank[, arm ...]")
    p.add_argument("--interactions", required=True, help="the interaction log (history and relevance)")
    p.add_argument("--taxonomy", required=True, help="taxonomy folder the metrics use (any, learned or editorial)")
    p.add_argument("--k", type=int, default=10, help="list cut-off (default 10)")
    p.add_argument("--group-by", help="a column of --recs to group lists by (e.g. arm or policy)")
    p.add_argument("--control", help="the group the others are compared with")
    p.add_argument("--horizon-days", type=float, default=7.0,
                   help="relevance: engaged interactions within this many days after the request (default 7)")
    p.add_argument("--level", type=int, help="taxonomy level for topic metrics (default: the finest)")
    p.add_argument("--items", help="items table: embeds items (learned taxonomy's model, cached) for the "
                                   "embedding diversity")
    p.add_argument("--out", required=True, help="output folder: metrics.parquet/.csv, summary.json, report.html")
    add_common(p)
    p.set_defaults(run=run)


def run(args) -> int:
    from ..evaluation.metrics import evaluate
    cfg = job_config(args)
    tax = Taxonomy.load(args.taxonomy)
    vectors = None
    if args.items:
        from ..evaluation.metrics import item_vectors
        vectors = item_vectors(read_table(Path(args.items)), tax, cfg.taxonomy)
    res = evaluate(read_table(Path(args.recs)), read_table(Path(args.interactions)), tax,
                   k=args.k, group_by=args.group_by, control=args.control, horizon_days=args.horizon_days,
                   label_config=cfg.labels, level=args.level, item_vectors=vectors)
    out = res.write(args.out)
    t = res.table[res.table["kind"] == "mean"]
    groups = sorted(t["group"].unique())
    print(f"evaluated {res.summary['lists']} lists of {res.summary['users']} users at k={args.k}")
    print("  " + f"{'metric':<16}" + "".join(f"{g[:22]:>24}" for g in groups))
    for m in dict.fromkeys(t["metric"]):
        row = t[t["metric"] == m].set_index("group")
        cells = []
        for g in groups:
            r = row.loc[g]
            ci = "" if r["lo"] != r["lo"] else f" [{r['lo']:.3f},{r['hi']:.3f}]"
            cells.append(f"{r['mean']:.3f}{ci}".rjust(24))
        print("  " + f"{m:<16}" + "".join(cells))
    print(f"  outputs: {out}/metrics.parquet, metrics.csv, summary.json, report.html")
    return 0

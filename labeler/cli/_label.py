"""`labeler label`."""
from __future__ import annotations

from ..engines import make_engine
from ..labels.plan import plan_labels
from ..taxonomy import Taxonomy
from ._options import add_common, add_input, job_config, show_progress


def register(sub) -> None:
    p = sub.add_parser("label", help="tag every interaction in-profile / new-interest and build footprints")
    p.add_argument("--taxonomy", required=True, help="taxonomy folder")
    p.add_argument("--interactions", required=True, help="interactions (Parquet file or folder, or CSV)")
    p.add_argument("--out", required=True, help="output folder: labels/, footprints.parquet, summary.json")
    p.add_argument("--engine", choices=["duckdb", "spark"], help="where the label rules run (default duckdb)")
    p.add_argument("--store", help="also publish a lookup-store snapshot to this folder")
    add_input(p)
    add_common(p)
    p.set_defaults(run=run)


def run(args) -> int:
    cfg = job_config(args, {"engine": {"engine": args.engine}} if args.engine else None)
    tax = Taxonomy.load(args.taxonomy)
    result = plan_labels(args.interactions, tax, cfg.labels, input_config=cfg.input,
                         engine=make_engine(cfg.engine))
    summary = result.write(args.out, progress=show_progress(args))
    print_summary(summary, args.out)
    if args.store:
        from ..store import publish_store
        name = publish_store(args.store, result, tax, cfg.labels)
        print(f"  store: published snapshot {name} to {args.store}")
    return 0


def print_summary(summary: dict, out: str) -> None:
    inp = summary["input"]
    print(f"labelled {inp['interactions_labelled']} interactions of {summary['users']} users "
          f"(taxonomy {summary['taxonomy_version'][:12]}, labels {summary['labels_version'][:12]})")
    skipped = {k: v for k, v in inp.items() if k in ("dropped_event_type", "duplicate_events_collapsed",
                                                     "interactions_on_items_without_topics",
                                                     "users_over_max_user_events") and v}
    if skipped:
        print("  set aside or flagged: " + ", ".join(f"{k}={v}" for k, v in skipped.items()))
    print(f"  {'level':>5} {'rows':>9} {'in_profile':>11} {'new_interest':>13} {'cold_start':>11} "
          f"{'unplaced':>9} {'discovery':>10}")
    for level, s in sorted(summary["levels"].items()):
        lab = s["labels"]
        print(f"  {level:>5} {s['rows']:>9} {lab['in_profile']:>11} {lab['new_interest']:>13} "
              f"{lab['cold_start']:>11} {lab['unplaced']:>9} {100 * s['discovery_share']:>9.1f}%")
    first = next(iter(sorted(summary["levels"].items())), None)
    if first:
        weeks = first[1]["new_interest_rate_by_week"]
        print("  new_interest rate by week (level " + first[0] + "): "
              + " ".join(f"{100 * w['new_interest_rate']:.0f}%" for w in weeks)
              + "  <- high early weeks mean unseen history; consider labels.label_from")
    print(f"  outputs: {out}/labels/ (by date), {out}/footprints.parquet, {out}/summary.json")

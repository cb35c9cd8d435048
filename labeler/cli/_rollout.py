"""`labeler rollout-check`."""
from __future__ import annotations

from pathlib import Path

from ..rollout.check import check_rollout, check_value
from ..tables import read_table
from ..taxonomy import Taxonomy
from ._options import add_common, add_input, job_config


def register(sub) -> None:
    p = sub.add_parser("rollout-check", help="compare a candidate taxonomy with the current one and "
                                             "apply the rollout gate (exit 1 when it fails)")
    p.add_argument("--current", required=True, help="the taxonomy folder in use")
    p.add_argument("--candidate", required=True, help="the taxonomy folder to check")
    p.add_argument("--interactions", required=True, help="interactions to compare labels on")
    p.add_argument("--out", required=True, help="output folder: report.html, summary.json, topic_map.csv, "
                                                "label_flips.csv")
    p.add_argument("--window-days", type=float, help="compare only the last N days (history still counts)")
    p.add_argument("--sample-users", type=int, help="compare N users (chosen by a hash of their id), each "
                                                     "with their full history")
    p.add_argument("--items", help="the items table: adds newly (un)placed counts and the candidate's silhouette")
    add_input(p)
    add_common(p)
    p.set_defaults(run=run)


def run(args) -> int:
    cfg = job_config(args)
    path = Path(args.interactions)
    interactions = str(path) if path.is_dir() or path.suffix.lower() in (".parquet", ".pq") else read_table(path)
    items = read_table(Path(args.items)) if args.items else None
    res = check_rollout(Taxonomy.load(args.current), Taxonomy.load(args.candidate), interactions, cfg.gate,
                        label_config=cfg.labels, window_days=args.window_days, sample=args.sample_users,
                        items=items)
    out = res.write(args.out)
    s = res.summary
    print(f"rollout check {s['current'][:12]} -> {s['candidate'][:12]}: "
          f"{'PASS' if res.passed else 'FAIL'}")
    print(f"  {s['gate']['levels_note']}; judged: level(s) {s['gate']['levels_judged']}")
    for name, c in s["gate"]["checks"].items():
        print(f"  {'ok  ' if c['passed'] else 'FAIL'} {name:<27} {check_value(c)} (needs {c['threshold']})")
    for w in s["gate"]["warnings"]:
        print(f"  note: {w}")
    for level, counts in s["topic_map_counts"].items():
        print(f"  level {level} topics: " + ", ".join(f"{k} {v}" for k, v in sorted(counts.items())))
    print(f"  outputs: {out}/report.html, summary.json, topic_map.csv, label_flips.csv")
    return 0 if res.passed else 1

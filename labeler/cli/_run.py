"""`labeler run`: the scheduled job."""
from __future__ import annotations

import json
import logging
import sys

from ._options import add_common, add_embedder, job_config, make_embedder


def register(sub) -> None:
    p = sub.add_parser("run", help="the scheduled batch job: new partitions and items in, labels, "
                                   "footprints and store out (incremental)")
    p.add_argument("--full", action="store_true", help="recompute every label instead of only what changed")
    p.add_argument("--rebuild-taxonomy", action="store_true",
                   help="build a candidate taxonomy and switch to it if the rollout gate passes")
    p.add_argument("--log-format", choices=["text", "json"], default="text",
                   help="stderr log lines as text (default) or one JSON object per line")
    add_embedder(p)
    add_common(p)
    p.set_defaults(run=run)


class _JsonLines(logging.Formatter):
    def format(self, record: logging.LogRecord) -> str:
        import datetime as dt
        when = dt.datetime.fromtimestamp(record.created, dt.timezone.utc).isoformat(timespec="milliseconds")
        return json.dumps({"time": when, "level": record.levelname,
                           "logger": record.name, "message": record.getMessage()})


def run(args) -> int:
    from ..job import run_job
    if args.log_format == "json":
        for h in logging.getLogger().handlers:
            h.setFormatter(_JsonLines())
    if not args.config:
        from ..errors import ConfigError
        raise ConfigError("labeler run needs --config job.toml (see fixtures/demo-job.toml).")
    cfg = job_config(args)
    embedder = make_embedder(args, cfg) if args.embedder == "hashing" else None
    interactive = sys.stderr.isatty() and not args.quiet
    result = run_job(cfg, full=args.full, rebuild_taxonomy=args.rebuild_taxonomy, embedder=embedder,
                     progress=interactive)
    m = result.manifest
    print(f"run {m['run']}: {m['status']} ({m['mode']}: {m['why']})")
    if m["status"] == "committed":
        print(f"  watermark {m['watermark']}; {m.get('continued_users', 0)} users continued from the carried "
              f"state, {m['relabelled_users']} re-labelled over their history from {m['relabelled_from']}; "
              f"{m['label_rows_written']} label rows written, "
              f"{len(m['dates_rewritten'])} dates rewritten, {m['dates_linked']} kept")
        print(f"  outputs: {cfg.work_dir}/outputs/{m['generation']}/ ; store snapshot {m['store']['snapshot']}")
    for name, err in m["rejected"].items():
        print(f"  rejected partition {name}: {err}")
    print(f"  manifest: {result.manifest_path}")
    return result.exit_code

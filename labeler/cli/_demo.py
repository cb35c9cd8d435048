"""`labeler demo`."""
from __future__ import annotations

from ..demo import run_demo
from ._options import add_common, add_embedder, show_progress


def register(sub) -> None:
    p = sub.add_parser("demo", help="generate the invented demo scenario and run every stage on it")
    p.add_argument("--out", default="demo-out", help="output folder (default demo-out)")
    p.add_argument("--seed", type=int, default=7, help="scenario seed (default 7)")
    p.add_argument("--small", action="store_true", help="a smaller scenario, for a quick look")
    add_embedder(p)
    add_common(p, config=False)
    p.set_defaults(run=run)


def run(args) -> int:
    from ..embed import HashingEmbedder
    embedder = HashingEmbedder(256) if args.embedder == "hashing" else None
    s = run_demo(args.out, seed=args.seed, embedder=embedder, progress=show_progress(args), small=args.small)
    t, lab = s["taxonomy"], s["labels"]
    print(f"demo scenario (seed {s['seed']}): {s['items']} items, {s['interactions']} interactions, "
          f"{s['users']} users -> {args.out}/data/")
    print(f"taxonomy {t['version'][:12]}: {t['topics_per_level']['0']} coarse / "
          f"{t['topics_per_level']['1']} fine topics, {t['unplaced']} items unplaced; "
          f"fine-topic AMI vs true themes {t['level1_ami_vs_true_theme']:.3f}, "
          f"coarse AMI vs true hobbies {t['level0_ami_vs_true_hobby']:.3f} -> {t['dir']}")
    for w in t.get("warnings", []):
        print(f"  taxonomy warning: {w}")
    f = s["fast_encoder"]
    if "skipped" in f:
        print(f"fast encoder: skipped ({f['skipped']})")
    else:
        print(f"fast encoder (taxonomy.encoder = distilled, fitted on {f['distilled_on']} items): "
              f"{f['topics_per_level']['1']} fine topics in {f['seconds']:.0f}s (the model's build: "
              f"{f['model_seconds']:.0f}s; the fit is a fixed cost of about half a minute, after which it "
              f"embeds about 140x faster than the model); "
              f"fine-topic AMI vs true themes {f['level1_ami_vs_true_theme']:.3f}, "
              f"agreement with the model's fine topics (ARI) {f['level1_ari_vs_model_taxonomy']:.3f} -> {f['dir']}")
    for level, v in sorted(lab["levels"].items()):
        c = v["labels"]
        print(f"labels level {level}: in_profile {c['in_profile']}, new_interest {c['new_interest']}, "
              f"cold_start {c['cold_start']}, unplaced {c['unplaced']}; discovery "
              f"{100 * v['discovery_share']:.1f}%")
    pl = lab["plans"]
    print(f"label plans: the sorted pass {pl['scan']['seconds']:.1f}s (with loading it), the windows "
          f"{pl['windows']['seconds']:.1f}s; both equal the labels written: "
          f"{'yes' if pl['scan']['same_labels'] and pl['windows']['same_labels'] else 'NO'}")
    pc = pl["pieces"]
    print(f"labels in pieces as a large run writes them (engine.bucket_rows = {pc['bucket_rows']:,}: "
          f"{pc['pieces']} pieces of users, {pc['seconds']:.1f}s): the same files as one pass: "
          f"{'yes' if pc['same_files'] else 'NO'}")
    print(f"true new-interest events after the burn-in ({lab['label_from'][:10]}): "
          f"{lab['true_new_interest_events_after_burn_in']}, labelled new_interest at level 1: "
          f"{100 * lab['share_labelled_new_interest_level1']:.1f}%")
    st = s["store"]
    ex = st["example_lookup"]
    print(f"store snapshot {st['snapshot']} -> {st['dir']}; e.g. `labeler lookup --store {st['dir']} "
          f"{ex['user_id']} --item {next(iter(ex['candidates']))}`: "
          + ", ".join(f"{i} {lab}" for i, lab in ex["candidates"].items()))
    job = s["job"]
    r1, r2 = job["runs"]
    print(f"scheduled job -> {job['work_dir']}: {r1['run']} {r1['mode']} ({r1['label_rows_written']} rows), then "
          f"{r2['run']} {r2['mode']}: {r2['continued_users']} users continued from the carried state, "
          f"{r2['relabelled_users']} re-labelled over their history, {r2['dates_linked']} dates kept as they were; "
          f"labels equal the batch labels: "
          f"{'yes' if job['labels_equal_batch_labels'] else 'NO'}")
    print("  next: `labeler run --config fixtures/demo-job.toml` runs the same job from a TOML file")
    e = s["evaluation"]
    print(f"evaluation of three policies ({e['lists']} lists at {e['request_time'][:10]}, k=10, next 2 weeks) "
          f"-> {e['dir']}/report.html")
    for name, m in sorted(e["policies"].items()):
        print(f"  {name:<12} precision {m['precision']:.3f}  ndcg {m['ndcg']:.3f}  novelty {m['novelty']:.2f}  "
              f"unexpectedness {m['unexpectedness']:.2f}  serendipity {m['serendipity']:.3f}")
    print("  expected order (unexpectedness: in_profile 0 < explore_mix; novelty: popularity lowest): "
          + ("holds" if e["expected_order_holds"] else "DOES NOT HOLD"))
    print(f"  try it: labeler evaluate --recs {e['recs']} --interactions {s['data']['interactions']} "
          f"--taxonomy {s['taxonomy']['dir']} --k 10 --group-by policy --control popularity "
          f"--horizon-days 14 --out {args.out}/evaluation-cli")
    for arm, m in sorted(e["arms_last_week"].items()):
        print(f"  arm {arm:<14} last week: {m['known_topics_per_user']:.2f} known topics per user, "
              f"{m['new_interest_per_active_user']:.2f} new interests per active user")
    print(f"outputs: {lab['dir']}/ and {args.out}/demo-summary.json")
    return 0

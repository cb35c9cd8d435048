"""`labeler taxonomy build|assign`."""
from __future__ import annotations

from ..tables import read_table
from ..taxonomy import Taxonomy, build_taxonomy
from ._options import add_common, add_embedder, job_config, make_embedder, show_progress


def register(sub) -> None:
    p = sub.add_parser("taxonomy", help="build a topic taxonomy or place new items in one")
    verbs = p.add_subparsers(dest="taxonomy_verb", metavar="ACTION", required=True)
    b = verbs.add_parser("build", help="learn a two-level taxonomy from item text (or take categories)")
    b.add_argument("--items", required=True, help="items table (Parquet or CSV)")
    b.add_argument("--out", required=True, help="taxonomy folder to write")
    b.add_argument("--previous", help="earlier taxonomy folder whose topic ids are kept where topics continue")
    b.add_argument("--from-categories", metavar="COLUMN",
                   help="build an editorial taxonomy from this category column instead of text")
    b.add_argument("--sep", default="|", help="separator of several categories in one cell (default '|')")
    b.add_argument("--parent-column", help="with --from-categories: column of parent categories (level 0)")
    add_embedder(b)
    add_common(b)
    b.set_defaults(run=run_build)
    a = verbs.add_parser("assign", help="place new items into an existing taxonomy without refitting")
    a.add_argument("--taxonomy", required=True, help="taxonomy folder")
    a.add_argument("--items", required=True, help="items to place (Parquet or CSV)")
    a.add_argument("--out", required=True, help="item_topics file to write (.parquet or .csv)")
    add_common(a, config=False)
    a.set_defaults(run=run_assign)


def run_build(args) -> int:
    cfg = job_config(args)
    items = read_table(args.items)
    if args.from_categories:
        tax = Taxonomy.from_categories(items, column=args.from_categories, sep=args.sep or None,
                                       parent_column=args.parent_column, source=args.items)
    else:
        previous = Taxonomy.load(args.previous) if args.previous else None
        tax = build_taxonomy(items, cfg.taxonomy, embedder=make_embedder(args, cfg), previous=previous,
                             progress=show_progress(args), source=args.items)
    tax.save(args.out)
    _print_taxonomy(tax, args.out)
    return 0


def _print_taxonomy(tax: Taxonomy, out: str) -> None:
    m = tax.manifest
    print(f"taxonomy {tax.version[:12]} ({tax.kind}) written to {out}")
    for level, g in tax.topics.groupby("level"):
        print(f"  level {level}: {len(g)} topics; largest: "
              + "; ".join(f"{r.topic_id} {r.name} ({r.size})" for r in g.nlargest(3, "size").itertuples()))
    n = m.get("n_items", 0)
    print(f"  items: {n}, unplaced: {m.get('n_unplaced', 0)} ({100.0 * m.get('n_unplaced', 0) / max(n, 1):.1f}%)")
    for w in m.get("warnings", []):
        print(f"  warning: {w}")
    if "encoder" in m:
        e = m["encoder"]
        print(f"  encoder: {e['kind']}, a token table fitted on {e['distilled_on']} items embedded with {e['teacher']}; "
              f"every item encoded with it (not cached)")
    elif "embedding_cache" in m:
        c = m["embedding_cache"]
        print(f"  embeddings: {c['hits']} from cache, {c['misses']} computed")


def run_assign(args) -> int:
    tax = Taxonomy.load(args.taxonomy)
    items = read_table(args.items)
    rows = tax.assign(items, progress=show_progress(args))
    if str(args.out).lower().endswith(".csv"):
        rows.to_csv(args.out, index=False)
    else:
        rows.to_parquet(args.out, index=False)
    s = tax.last_assign_stats
    print(f"placed {s['items'] - s['unplaced']} of {s['items']} items into taxonomy {tax.version[:12]}; "
          f"{s['unplaced']} unplaced ({100.0 * s['unplaced'] / max(s['items'], 1):.1f}%); wrote {args.out}")
    return 0

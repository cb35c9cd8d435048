"""report.html of an evaluation: metric bars with intervals per group, interest growth over weeks,
and activity-cohort movement per arm. Input text (group names, ids) is escaped."""
from __future__ import annotations

import numpy as np
import pandas as pd

from .. import report

SHOWN = ("precision", "recall", "map", "ndcg", "ild_topic", "novelty", "unexpectedness", "serendipity")


def metric_figure(ev):
    t = ev.table[(ev.table["kind"] == "mean") & ev.table["metric"].isin(SHOWN)]
    groups = sorted(t["group"].unique())
    shown = [m for m in SHOWN if m in set(t["metric"])]
    cols = 4
    rows = int(np.ceil(len(shown) / cols))
    fig = report.new_figure(12, 2.9 * rows + 0.6)
    for k, m in enumerate(shown):
        ax = fig.add_subplot(rows, cols, k + 1)
        d = t[t["metric"] == m].set_index("group").reindex(groups)
        err = np.vstack([(d["mean"] - d["lo"]).fillna(0).clip(lower=0), (d["hi"] - d["mean"]).fillna(0).clip(lower=0)])
        ax.bar(range(len(groups)), d["mean"].fillna(0), yerr=err, capsize=3, color="#4c78a8")
        ax.set_xticks(range(len(groups)), [g if len(g) <= 12 else g[:11] + "…" for g in groups],
                      fontsize=7, rotation=30, ha="right")
        ax.set_title(f"{m}@k" if m in ("precision", "recall", "map", "ndcg") else m, fontsize=9)
        ax.tick_params(axis="y", labelsize=7)
    fig.suptitle("Metrics per group: mean over lists, 95% bootstrap interval over users", fontsize=10)
    fig.tight_layout(rect=(0, 0, 1, 0.95))
    return fig


def growth_figure(ev):
    g = ev.growth
    metrics = list(dict.fromkeys(g["metric"]))
    fig = report.new_figure(12, 3.4)
    for k, m in enumerate(metrics):
        ax = fig.add_subplot(1, len(metrics), k + 1)
        for arm, a in g[g["metric"] == m].groupby("arm"):
            ax.plot(a["week"], a["mean"], marker="o", ms=3, label=str(arm))
            ax.fill_between(a["week"], a["lo"], a["hi"], alpha=0.2)
        ax.set_title(m.replace("_", " "), fontsize=9)
        ax.set_xlabel("week", fontsize=8)
        ax.tick_params(labelsize=7)
        if k == 0:
            ax.legend(fontsize=7, frameon=False)
    fig.suptitle("Interest growth by arm and week (95% bootstrap interval over users)", fontsize=10)
    fig.tight_layout(rect=(0, 0, 1, 0.92))
    return fig


def cohort_figure(ev):
    c = ev.cohorts
    arms = sorted(c["arm"].unique())
    order = ["inactive", "casual", "core"]
    fig = report.new_figure(4.2 * len(arms), 3.8)
    for k, arm in enumerate(arms):
        ax = fig.add_subplot(1, len(arms), k + 1)
        m = c[c["arm"] == arm].pivot(index="from", columns="to", values="share").reindex(index=order, columns=order)
        ax.imshow(m.fillna(0).to_numpy(), cmap="Greens", vmin=0, vmax=1)
        ax.set_xticks(range(3), order, fontsize=8)
        ax.set_yticks(range(3), order, fontsize=8)
        ax.set_xlabel("cohort at the end", fontsize=8)
        ax.set_ylabel("cohort at the start", fontsize=8)
        for i in range(3):
            for j in range(3):
                v = m.iat[i, j]
                ax.text(j, i, "–" if pd.isna(v) else f"{v:.2f}", ha="center", va="center", fontsize=8)
        ax.set_title(f"arm {arm}", fontsize=9)
    fig.suptitle("Activity cohorts: share of each starting cohort ending in each", fontsize=10)
    fig.tight_layout(rect=(0, 0, 1, 0.9))
    return fig


def figures(ev) -> dict:
    out = {"metrics": metric_figure(ev)}
    if ev.growth is not None and len(ev.growth):
        out["growth"] = growth_figure(ev)
        out["cohorts"] = cohort_figure(ev)
    return out


def render(ev) -> str:
    from ..report import esc, image, table
    with report.plain_text():  # names from the inputs are text, not math markup
        figs = figures(ev)
    pngs = {k: report.figure_png(f) for k, f in figs.items()}
    for f in figs.values():
        report.close(f)
    s = ev.summary
    intro = (f"<p>{s['lists']} lists of {s['users']} users at k = {s['k']}, level {s['level']}, relevance "
             f"horizon {s['horizon_days']} days; {s['lists_without_relevant_items']} lists had no relevant item "
             f"and are left out of the accuracy metrics. AP: {esc(s['ap_normalisation'])}.</p>")
    means = ev.table[ev.table["kind"] == "mean"].pivot(index="metric", columns="group", values="mean").reset_index()
    sections = [("Metrics", image(pngs["metrics"], "metrics per group") + table(means, max_rows=100))]
    diffs = ev.table[ev.table["kind"] == "difference"]
    if len(diffs):
        sections.append(("Differences from the control group", table(diffs[["group", "metric", "mean", "lo", "hi"]]
                                                                      .rename(columns={"mean": "difference"}), 100)))
    if "growth" in pngs:
        sections.append(("Interest growth", image(pngs["growth"], "interest growth by arm")))
        sections.append(("Activity cohorts", image(pngs["cohorts"], "cohort movement") + table(ev.cohorts, 60)))
    return report.page("Offline evaluation", sections, intro)

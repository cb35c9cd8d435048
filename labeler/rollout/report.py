"""The rollout check's report for people: a self-contained report.html with its figures.

Figures: the topic flow (current topics on the left, candidate topics on the right, a line per
pair sharing items, its width growing with the items shared), the label flip matrix, topic
sizes, and agreement per level. Names and ids from the inputs are escaped in the HTML.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from .. import report
from ..tables import LABEL_VALUES

STATUS_COLOURS = {"kept": "#4c78a8", "renamed": "#72b7b2", "split": "#f58518", "merged": "#e45756",
                  "retired": "#9d755d", "new": "#54a24b"}
FLOW_TOPICS = 20  # topics shown per side; the rest are summed into one "other" row


def _short(text: str, n: int = 30) -> str:
    text = str(text)
    return text if len(text) <= n else text[: n - 1] + "…"


def flow_figure(result, level: int):
    """Current -> candidate topics at ``level``; the largest FLOW_TOPICS per side are named."""
    c = result.contingency[result.contingency["level"] == level]
    tmap = result.topic_map[result.topic_map["level"] == level]
    cur = tmap[tmap["side"] == "current"].sort_values(["size", "topic_id"], ascending=[False, True])
    cand_sizes = c.groupby("topic_id_cand")["n"].sum().sort_values(ascending=False)
    left = cur["topic_id"].head(FLOW_TOPICS).tolist()
    right = cand_sizes.index[:FLOW_TOPICS].tolist()
    # order the right side by where most of each topic's items come from, to limit crossings
    pos_left = {t: k for k, t in enumerate(left)}
    main = c.sort_values("n", ascending=False).drop_duplicates("topic_id_cand").set_index("topic_id_cand")["topic_id_cur"]
    right.sort(key=lambda t: (pos_left.get(main.get(t), len(left)), t))
    other_l, other_r = len(cur) - len(left), len(cand_sizes) - len(right)
    rows = max(len(left) + (other_l > 0), len(right) + (other_r > 0), 2)
    fig = report.new_figure(11, 0.32 * rows + 1.6)
    ax = fig.add_axes([0.3, 0.12, 0.4, 0.78])
    ax.set_axis_off()
    ax.set_xlim(0, 1)
    ax.set_ylim(rows - 0.5, -0.8)

    def y(names, other):
        return {t: k for k, t in enumerate(names)}, (len(names) if other else None)
    yl, yl_other = y(left, other_l)
    yr, yr_other = y(right, other_r)
    status = dict(zip(cur["topic_id"], cur["status"]))
    top = c["n"].max() if len(c) else 1
    for rec in c.itertuples():
        a = yl.get(rec.topic_id_cur, yl_other)
        b = yr.get(rec.topic_id_cand, yr_other)
        if a is None or b is None:
            continue
        ax.plot([0, 1], [a, b], color=STATUS_COLOURS.get(status.get(rec.topic_id_cur), "#999999"),
                alpha=0.45, linewidth=0.6 + 6 * np.sqrt(rec.n / top), solid_capstyle="butt")
    names_l, names_r = result.names_current, result.names_candidate
    for t, k in yl.items():
        ax.text(-0.02, k, _short(names_l.get(t, t)), ha="right", va="center", fontsize=8)
    for t, k in yr.items():
        ax.text(1.02, k, _short(names_r.get(t, t)), ha="left", va="center", fontsize=8)
    if yl_other is not None:
        ax.text(-0.02, yl_other, f"{other_l} other topics", ha="right", va="center", fontsize=8, style="italic")
    if yr_other is not None:
        ax.text(1.02, yr_other, f"{other_r} other topics", ha="left", va="center", fontsize=8, style="italic")
    ax.text(0, -0.7, "current", ha="center", va="bottom", fontsize=9, weight="bold")
    ax.text(1, -0.7, "candidate", ha="center", va="bottom", fontsize=9, weight="bold")
    fig.suptitle(f"Topic flow at level {level}: a line per topic pair sharing items (wider = more)",
                 fontsize=10, y=0.985)
    from matplotlib.lines import Line2D
    handles = [Line2D([0], [0], color=col, lw=4, alpha=0.6) for s, col in STATUS_COLOURS.items() if s != "new"]
    fig.legend(handles, [s for s in STATUS_COLOURS if s != "new"], loc="lower center", ncol=5, fontsize=8,
               frameon=False, title="current topic's status", title_fontsize=8)
    return fig


def flip_figure(result, level: int):
    f = result.flips[result.flips["level"] == level]
    m = pd.DataFrame(0, index=list(LABEL_VALUES), columns=list(LABEL_VALUES))
    for rec in f.itertuples():
        m.loc[rec.label_cur, rec.label_cand] += rec.rows
    fig = report.new_figure(6.5, 4.6)
    ax = fig.add_axes([0.25, 0.2, 0.6, 0.65])
    shares = m.to_numpy(dtype=float) / max(m.to_numpy().sum(), 1)
    ax.imshow(shares, cmap="Blues", vmin=0, vmax=max(shares.max(), 1e-9))
    ax.set_xticks(range(len(m.columns)), [s.replace("_", " ") for s in m.columns], fontsize=8)
    ax.set_yticks(range(len(m.index)), [s.replace("_", " ") for s in m.index], fontsize=8)
    ax.set_xlabel("label under the candidate", fontsize=9)
    ax.set_ylabel("label under the current taxonomy", fontsize=9)
    for i in range(len(m.index)):
        for j in range(len(m.columns)):
            v = int(m.iat[i, j])
            ax.text(j, i, f"{v:,}", ha="center", va="center", fontsize=7,
                    color="white" if shares[i, j] > 0.5 * shares.max() else "black")
    ax.set_title(f"Labels at level {level}: current vs candidate (rows compared)", fontsize=10)
    return fig


def size_figure(result, level: int):
    tmap = result.topic_map[result.topic_map["level"] == level]
    cur = tmap.loc[tmap["side"] == "current", "size"].to_numpy()
    cand = np.asarray(result.candidate_sizes.get(level, []))
    fig = report.new_figure(7, 3.8)
    ax = fig.add_axes([0.12, 0.18, 0.83, 0.68])
    top = max([1, *cur.tolist(), *cand.tolist()])
    bins = np.unique(np.geomspace(1, top + 1, 15).astype(int))
    ax.hist([cur, cand], bins=bins, label=["current", "candidate"], color=["#4c78a8", "#f58518"])
    ax.set_xscale("log")
    ax.set_xlabel("items per topic (log scale)", fontsize=9)
    ax.set_ylabel("topics", fontsize=9)
    ax.tick_params(labelsize=8)
    ax.legend(fontsize=8, frameon=False)
    ax.set_title(f"Topic sizes at level {level}", fontsize=10)
    return fig


def agreement_figure(result):
    agree = result.summary["agreement"]
    levels = sorted(agree)
    fig = report.new_figure(6.5, 3.6)
    ax = fig.add_axes([0.12, 0.16, 0.83, 0.7])
    width = 0.8 / 3
    for k, metric in enumerate(("ari", "ami", "nmi")):
        xs = np.arange(len(levels)) + (k - 1) * width
        vals = [agree[lv][metric] for lv in levels]
        ax.bar(xs, vals, width * 0.95, label=metric.upper())
        for x, v in zip(xs, vals):
            ax.text(x, v + 0.02, f"{v:.2f}", ha="center", va="bottom", fontsize=7)
    ax.set_xticks(range(len(levels)), [f"level {lv}" for lv in levels], fontsize=8)
    ax.set_ylim(0, 1.15)
    ax.set_ylabel("agreement (1 = same grouping)", fontsize=9)
    ax.tick_params(labelsize=8)
    ax.legend(fontsize=8, frameon=False, ncol=3, loc="upper left")
    ax.set_title("Item assignment agreement, current vs candidate", fontsize=10)
    return fig


def figures(result) -> dict[str, object]:
    out = {"agreement": agreement_figure(result)}
    for level in result.summary["levels"]:
        out[f"flow_level{level}"] = flow_figure(result, level)
        out[f"labels_level{level}"] = flip_figure(result, level)
        out[f"sizes_level{level}"] = size_figure(result, level)
    return out


def render(result) -> str:
    """report.html of a rollout check, with its figures embedded."""
    from ..report import esc, image, table
    s = result.summary
    with report.plain_text():  # names from the inputs are text, not math markup
        figs = figures(result)
    pngs = {k: report.figure_png(f) for k, f in figs.items()}
    for f in figs.values():
        report.close(f)
    gate = s["gate"]
    checks = pd.DataFrame([{"check": k, "value": c["value"], "threshold": c["threshold"],
                            "result": "pass" if c["passed"] else "FAIL"} for k, c in gate["checks"].items()])
    verdict = (f"<p class='{'pass' if gate['passed'] else 'fail'}'>Gate: "
               f"{'PASS' if gate['passed'] else 'FAIL'}</p>")
    intro = (f"<p>Current taxonomy <code>{esc(s['current'][:16])}</code>, candidate "
             f"<code>{esc(s['candidate'][:16])}</code>; {esc(gate['levels_note'])}; the gate judged "
             f"level(s) {esc(gate['levels_judged'])}.</p>{verdict}")
    notes = "".join(f"<li>{esc(w)}</li>" for w in gate["warnings"])
    sections = [("Gate", table(checks) + (f"<p>Noted, not judged:</p><ul>{notes}</ul>" if notes else ""))]
    agree = pd.DataFrame([{"level": lv, **v} for lv, v in s["agreement"].items()])
    sections.append(("Assignment agreement", table(agree) + image(pngs["agreement"], "agreement per level")))
    for level in s["levels"]:
        tm = result.topic_map[result.topic_map["level"] == level].drop(columns="level")
        counts = ", ".join(f"{esc(k)} {v}" for k, v in sorted(s["topic_map_counts"][str(level)].items()))
        changed = tm[~tm["status"].isin(["kept"])]
        body = (f"<p>{counts}.</p>" + image(pngs[f"flow_level{level}"], f"topic flow at level {level}")
                + "<p>Topics that did not simply continue:</p>" + table(changed, max_rows=60))
        sections.append((f"Topic map, level {level}", body))
        lv = s["labels"]["levels"].get(str(level))
        if lv:
            rates = pd.DataFrame([
                {"measure": "rows compared", "current": lv["rows"], "candidate": lv["rows"]},
                {"measure": "new_interest rate", "current": lv["new_interest_rate"][0], "candidate": lv["new_interest_rate"][1]},
                {"measure": "discovery rate", "current": lv["discovery_rate"][0], "candidate": lv["discovery_rate"][1]},
                {"measure": "total shaped reward", "current": lv["shaped_reward_total"][0], "candidate": lv["shaped_reward_total"][1]}])
            flips = pd.DataFrame([{k: lv[k] for k in ("flip_share", "in_profile_to_new_interest",
                                                       "new_interest_to_in_profile", "to_unplaced", "from_unplaced")}])
            sections.append((f"Label impact, level {level}", table(flips) + table(rates)
                             + image(pngs[f"labels_level{level}"], f"label flips at level {level}")))
        sections.append((f"Topic sizes, level {level}", image(pngs[f"sizes_level{level}"], f"topic sizes at level {level}")))
    lab = s["labels"]
    fp = lab["footprint_known_topics"]
    fp_rows = pd.DataFrame([{"level": lv, "side": side, **vals} for side in ("current", "candidate")
                            for lv, vals in fp[side].items()])
    users = pd.DataFrame(list(lab["users_most_affected"].items()), columns=["user_id", "label flips"])
    topics = pd.DataFrame([(t, result.names_current.get(t, t), n) for t, n in lab["topics_most_affected"].items()],
                          columns=["topic_id", "name", "label flips"])
    sections.append(("Users and topics most affected", "<p>Known topics per user at the end (median, p90):</p>"
                     + table(fp_rows) + table(users) + table(topics)))
    q = s["candidate_quality"]
    qual = pd.DataFrame([{"measure": "unplaced share", "value": q["unplaced_share"]},
                         {"measure": "silhouette (sample)", "value": q.get("silhouette")}])
    sections.append(("Candidate on its own", table(qual) + "<p>Smallest topics:</p>" + table(pd.DataFrame(q["smallest"]))
                     + "<p>Largest topics:</p>" + table(pd.DataFrame(q["largest"]))))
    return report.page("Taxonomy rollout check", sections, intro)

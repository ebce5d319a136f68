# report-kit: multi-arm
# %% [markdown]
# ## About this study

# %% tags=["parameters"]
run_dir = ""
project_dir = ""

# %%
import pandas as pd

from report_kit.report import (
    ASSIGNMENT_CHECK_WORDS, RunView, callout, esc, fmt, fmt_count, p_phrase, points_box, show_opening, show_outcomes,
    show_table,
)

view = RunView.open(run_dir, project_dir)
res = view.results
spec = view.spec
d = res["design"]
label_of = {a["arm"]: a["label"] for a in d["arms"]}
level = view.level

# %%
show_opening(view)

# %% [markdown]
# ## Main results

# %%
tests = {(t["outcome"], t["arm"], t["reference"]): t for t in res["tests"] if t.get("factor") is None}
adjusted = {(m["outcome"], m["arm"], m["reference"]): m["p_adjusted"] for m in res["multiplicity"] if m["lead"]}
lines = []
for outcome in spec.outcomes:
    omnibus = tests.get((outcome.column, None, None), {})
    parts = []
    seen = set()
    for row in res["estimates"]:
        key = (row["outcome"], row["arm"], row["reference"])
        if row["outcome"] != outcome.column or row["estimator"] != "unadjusted" or row["arm"] is None \
                or row["estimand"] not in ("ATE", "ITT") or key in seen:
            continue
        seen.add(key)
        adj = adjusted.get(key)
        adj_text = "" if adj is None else f", adjusted {p_phrase(adj)}"
        parts.append(f"<li>{esc(label_of[row['arm']])} vs {esc(label_of[row['reference']])}: "
                     f"<b>{fmt(row['estimate'])}</b> ({level}% CI {fmt(row['ci_low'])} to {fmt(row['ci_high'])}; "
                     f"{p_phrase(tests.get(key, {}).get('p_value'))}{adj_text})</li>")
    lines.append(f"<li><b>{esc(outcome.label)}</b> ({esc(outcome.family)}): any difference between the arms, "
                 f"{p_phrase(omnibus.get('p_value'))}<ul>{''.join(parts)}</ul></li>")
callout("<b>Pre-specified contrasts for each outcome</b> (difference in means by design; randomization "
        "p-values; adjusted within each outcome family):<ul>" + "".join(lines) + "</ul>", "info")
box = points_box(res.get("points_to_weigh") or [])
if box:
    callout(box, "caution")

# %% [markdown]
# ## Design

# %%
MECH_WORDS = {
    "complete": "complete randomization (fixed arm sizes)",
    "bernoulli": "independent draws per unit (Bernoulli)",
    "blocked": "randomization within blocks",
    "cluster": "whole clusters randomized",
    "blocked_cluster": "whole clusters randomized within blocks",
}
rows = [("Assignment mechanism", MECH_WORDS.get(d["mechanism"], d["mechanism"])),
        ("Units", f"{d['n_units']:,}"),
        ("Arms", f"{len(d['arms'])} (reference: {d['arms'][0]['label']})"),
        ("Contrasts", "each arm against the reference" if d["contrasts"] == "reference" else "every pair of arms")]
if d.get("factors"):
    rows.append(("Factorial design", " × ".join(f"{name} (on in: {', '.join(label_of[a] for a in on)})"
                                                for name, on in d["factors"].items())))
if d.get("n_blocks") is not None:
    rows.append(("Blocks", f"{d['n_blocks']:,}"))
if d.get("n_clusters") is not None:
    rows.append(("Clusters", f"{d['n_clusters']:,}"))
rows.append(("Possible assignments", fmt_count(d["n_assignments"], d.get("n_assignments_log10"))))
rows.append(("Assignment check", ASSIGNMENT_CHECK_WORDS.get(d["assignment_check"], d["assignment_check"])))
show_table(view, pd.DataFrame(rows, columns=["Item", "Value"]), "design", caption="The design as randomized")

# %%
arms = pd.DataFrame(res["arms"])
table = pd.DataFrame({
    "Outcome": [view.label(o) for o in arms["outcome"]],
    "Arm": arms["label"],
    "Units": arms["n_units"],
    "Outcome observed": arms["n_observed"],
    "Mean": arms["mean"],
    "SD": arms["sd"],
})
show_table(view, table, "arms", caption="The arms: sizes and outcome means", csv_frame=arms)

# %%
show_outcomes(view)

# %% [markdown]
# ## About this study

# %% tags=["parameters"]
run_dir = ""
project_dir = ""

# %%
import pandas as pd

from report_kit.report import RunView, callout, cautions, esc, fmt, fmt_count, p_phrase, say, show_table

view = RunView.open(run_dir, project_dir)
res = view.results
spec = view.spec
d = res["design"]

# %%
if spec.summary:
    say(esc(spec.summary.strip()))
callout("<b>Read this first.</b><ul>" + "".join(f"<li>{c}</li>" for c in cautions(view.plan)) + "</ul>", "caution")

# %% [markdown]
# ## Main results

# %%
level = view.level
tests = {t["outcome"]: t for t in res.get("tests") or []}
lead_method = spec.analysis.multiplicity
adjusted = {m["outcome"]: m["p_adjusted"] for m in res.get("multiplicity") or [] if m.get("lead")}
lines = []
for _, row in view.lead_estimates().iterrows():
    outcome = next(o for o in spec.outcomes if o.column == row["outcome"])
    test = tests.get(row["outcome"], {})
    adj = adjusted.get(row["outcome"])
    adj_text = "" if adj is None or lead_method == "none" else f"; adjusted for multiple outcomes, {p_phrase(adj)}"
    lines.append(
        f"<li><b>{esc(outcome.label)}</b> ({esc(outcome.family)}): estimated effect <b>{fmt(row['estimate'])}</b> "
        f"({level}% CI {fmt(row['ci_low'])} to {fmt(row['ci_high'])}); randomization test "
        f"{p_phrase(test.get('p_value'))}{adj_text}.</li>")
if lines:
    callout("<b>Pre-specified estimate for each outcome</b> (the design-based estimator the design implies; "
            "other estimators follow under Average effects as checks):<ul>" + "".join(lines) + "</ul>", "info")

# %% [markdown]
# ## Design

# %%
MECH_WORDS = {
    "complete": "complete randomization (a fixed number of units treated)",
    "bernoulli": "independent coin flips per unit (Bernoulli)",
    "blocked": "randomization within blocks",
    "cluster": "whole clusters randomized",
    "blocked_cluster": "whole clusters randomized within blocks",
    "matched_pairs": "one unit of each matched pair treated",
}
rows = [
    ("Assignment mechanism", MECH_WORDS.get(d["mechanism"], d["mechanism"])),
    ("Units", f"{d['n_units']:,}"),
    ("Assigned to treatment", f"{d['n_treated']:,}"),
    ("Assigned to control", f"{d['n_control']:,}"),
]
if d.get("n_blocks") is not None:
    rows.append(("Blocks" if d["mechanism"] != "matched_pairs" else "Pairs", f"{d['n_blocks']:,}"))
if d.get("n_clusters") is not None:
    rows.append(("Clusters", f"{d['n_clusters']:,}"))
if d.get("n_assignments") is not None or d.get("n_assignments_log10") is not None:
    rows.append(("Possible assignments", fmt_count(d["n_assignments"], d.get("n_assignments_log10"))))
check_words = {
    "reproduced": "re-drawn from the recorded seed: identical",
    "mismatch": "re-drawn from the recorded seed: DIFFERENT (see check output)",
    "not_checked": "not checked (no assignment seed recorded)",
}
rows.append(("Assignment check", check_words.get(d["assignment_check"], d["assignment_check"])))
show_table(view, pd.DataFrame(rows, columns=["Item", "Value"]), "design", caption="The design as randomized")

# %%
outs = pd.DataFrame(
    [(o.label, o.column, o.family, o.alternative, o.statistic.replace("_", " ")) for o in spec.outcomes],
    columns=["Outcome", "Column", "Family", "Alternative", "Test statistic"],
)
show_table(view, outs, "outcomes", caption="Pre-specified outcomes")

# report-kit: two-arm
# %% [markdown]
# ## About this study

# %% tags=["parameters"]
run_dir = ""
project_dir = ""
compare_to = ""

# %%
import pandas as pd

from report_kit.report.view import (
    ASSIGNMENT_CHECK_WORDS, RunView, callout, estimate_role, fmt, p_phrase, show_opening, show_outcomes,
    show_table,
)

view = RunView.open(run_dir, project_dir)
res = view.results
spec = view.spec
d = res["design"]

# %%
show_opening(view)

# %% [markdown]
# ## Main results

# %%
alpha = spec.analysis.alpha
level = round(100 * (1 - alpha))
seen: set = set()
tests = {t["outcome"]: t for t in res.get("tests") or []}
lead_method = spec.analysis.multiplicity
adjusted = {m["outcome"]: m["p_adjusted"] for m in res.get("multiplicity") or [] if m.get("lead")}
lines = []
for row in res["estimates"]:
    if estimate_role(row, seen) != "lead" or row["estimand"] not in ("ATE", "ITT") or row["subgroup"]:
        continue
    outcome = next((o for o in spec.outcomes if o.column == row["outcome"]), None)
    if outcome is None:
        continue
    test = tests.get(row["outcome"], {})
    adj = adjusted.get(row["outcome"])
    adj_text = "" if adj is None or lead_method == "none" else f"; adjusted for multiple outcomes, {p_phrase(adj)}"
    lines.append(
        f"<li><b>{outcome.label}</b> ({outcome.family}): estimated effect <b>{fmt(row['estimate'])}</b> "
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
if d.get("n_assignments") is not None:
    rows.append(("Possible assignments", f"{int(d['n_assignments']):,}"))
rows.append(("Assignment check", ASSIGNMENT_CHECK_WORDS.get(d["assignment_check"], d["assignment_check"])))
show_table(view, pd.DataFrame(rows, columns=["Item", "Value"]), "design", caption="The design as randomized")

# %%
show_outcomes(view)

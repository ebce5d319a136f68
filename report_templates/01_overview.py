# report-kit: two-arm
# %% [markdown]
# ## About this study

# %% tags=["parameters"]
run_dir = ""
project_dir = ""

# %%
import pandas as pd

from report_kit.report import (
    ASSIGNMENT_CHECK_WORDS, RunView, callout, decimals_for, esc, fmt_at, fmt_count, headline_cards, p_phrase,
    points_box, show_opening, show_outcomes, show_table,
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
level = view.level
tests = {t["outcome"]: t for t in res.get("tests") or []}
lead_method = spec.analysis.multiplicity
adjusted = {m["outcome"]: m["p_adjusted"] for m in res.get("multiplicity") or [] if m.get("lead")}
lead_rows = {}
for row in res["estimates"]:  # the pre-specified estimate of each outcome, as the analysis stored it
    if row.get("role") == "lead" and row["estimand"] in ("ATE", "ITT") and not row["subgroup"]:
        lead_rows.setdefault(row["outcome"], row)
cards = headline_cards(res, spec, lead_rows=lead_rows)
if cards:
    callout("<b>Primary outcomes</b> (the design-based estimate the design implies; the effect is "
            f"{esc(spec.design.arm_labels[1])} minus {esc(spec.design.arm_labels[0])}):" + cards, "info")
box = points_box(res.get("points_to_weigh") or [])
if box:
    callout(box, "caution")
lines = []
for outcome in spec.outcomes:
    row = lead_rows.get(outcome.column)
    if row is None or outcome.family == "primary":
        continue
    test = tests.get(outcome.column, {})
    adj = adjusted.get(outcome.column)
    adj_text = "" if adj is None or lead_method == "none" else f"; adjusted for multiple outcomes, {p_phrase(adj)}"
    k = decimals_for(row["std_error"])
    unit = f" {esc(outcome.unit)}" if outcome.unit else ""
    lines.append(
        f"<li><b>{esc(outcome.label)}</b> ({esc(outcome.family)}): estimated effect "
        f"<b>{fmt_at(row['estimate'], k, sign=True)}{unit}</b> "
        f"({level}% CI {fmt_at(row['ci_low'], k)} to {fmt_at(row['ci_high'], k)}); randomization test "
        f"{p_phrase(test.get('p_value'))}{adj_text}.</li>")
if lines:
    callout("<b>Other pre-specified outcomes</b> (other estimators follow under Average effects as checks):"
            "<ul>" + "".join(lines) + "</ul>", "info")

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
rows.append(("Assignment check", ASSIGNMENT_CHECK_WORDS.get(d["assignment_check"], d["assignment_check"])))
show_table(view, pd.DataFrame(rows, columns=["Item", "Value"]), "design", caption="The design as randomized")

# %%
show_outcomes(view)

# report-kit: two-arm
# %% [markdown]
# ## Average effects

# %% tags=["parameters"]
run_dir = ""
project_dir = ""

# %%

import pandas as pd

from report_kit.report import RunView, effect_plot, esc, say, show_figure, show_table

view = RunView.open(run_dir, project_dir)
res = view.results
est = view.estimates()
level = view.level

# %%
clustered = view.results["design"].get("n_clusters") is not None
say(
    "The first row of each outcome is the pre-specified estimate: the design-based estimator the assignment "
    "mechanism implies. The covariate-adjusted (Lin 2013) estimate, when covariates were pre-specified, is "
    "reported beside it"
    + (", and the Horvitz–Thompson estimate, which is unbiased but sensitive to unequal cluster sizes, as a "
       "robustness check. " if clustered else ". ")
    + f"Each row is a design-based estimate of the average effect of assignment with its standard error "
    f"and a {level}% confidence interval. Units missing an outcome are left out of that outcome only; "
    "the counts used are shown per arm. Methods and formulas: docs/methods.md."
)

# %%
for handled in res.get("data_handling", []):  # declared in design.yaml; the sentence comes from results.json
    say(esc(handled["statement"]))

# %%
METHOD_WORDS = {
    "neyman": "Difference in means",
    "blocked_neyman": "Block-weighted",
    "paired": "Paired",
    "cr2": "Difference in means, CR2",
    "horvitz_thompson": "Horvitz–Thompson",
    "lin_hc2": "Lin adjusted, HC2",
    "lin_cr2": "Lin adjusted, CR2",
    "wald_delta": "Wald ratio",
}


ROLE_WORDS = {"lead": "pre-specified", "adjusted": "covariate-adjusted", "check": "robustness check",
              "take_up": "first stage", "": ""}


def family_table(rows: pd.DataFrame) -> pd.DataFrame:
    return pd.DataFrame({
        "Outcome": [view.label(o) for o in rows["outcome"]],
        "Role": [ROLE_WORDS.get(r, r) for r in rows["role"]],
        "Estimand": rows["estimand"],
        "Method": [METHOD_WORDS.get(m, m) for m in rows.get("method", rows["estimator"])],
        "Estimate": rows["estimate"],
        "Std. error": rows["std_error"],
        f"{level}% CI low": rows["ci_low"],
        f"{level}% CI high": rows["ci_high"],
        "n treated": rows["n_treated"],
        "n control": rows["n_control"],
    })


# Each family's table is followed by its figure, so a figure (which cannot break across pages) is never
# larger than one family's outcomes and a page does not end half empty before it.
main = view.main_estimates()
for family in ("primary", "secondary", "exploratory"):
    rows = main[[view.family(o) == family for o in main["outcome"]]]
    if len(rows):
        show_table(view, family_table(rows), f"estimates_{family}",
                   caption=f"{family.capitalize()} outcomes", csv_frame=rows)
        show_figure(view, effect_plot(rows, labeler=view.label, level=level), f"effects_{family}",
                    caption=f"{family.capitalize()} outcomes: estimates with {level}% confidence intervals; "
                            "the dashed line marks no effect.")

# %%
comp = res.get("compliance")
if comp:
    say("### Take-up and the effect on compliers\n\n"
        f"Of the units assigned to the {esc(view.spec.design.arm_labels[1])} arm, "
        f"{100 * comp['rate_treated']:.1f}% received the treatment (column <code>{esc(comp['received'])}</code>); of the "
        f"{esc(view.spec.design.arm_labels[0])} arm, {100 * comp['rate_control']:.1f}% did. "
        "The effect of assignment (ITT) is the policy-relevant effect of offering the programme. "
        "The complier average causal effect (CACE) scales it by the difference in take-up: the average effect "
        "of receiving the programme for units that take it when offered and only then. It assumes that "
        "assignment affects outcomes only through take-up and that no unit takes it up only when not offered "
        "(Angrist, Imbens & Rubin 1996).")
    for item in comp.get("cace") or []:
        if item.get("ar_shape") == "bounded":
            say(f"Anderson–Rubin {100 - 100 * view.spec.analysis.alpha:g}% interval for the complier effect on "
                f"{esc(view.label(item['outcome']))}, valid however weak the take-up difference: "
                f"[{item['ar_ci_low']:.3g}, {item['ar_ci_high']:.3g}].")
        elif item.get("ar_shape"):
            say(f"The Anderson–Rubin interval for the complier effect on {esc(view.label(item['outcome']))} is "
                "unbounded: the take-up difference is too weak to pin the effect down.")
    rows = view.take_up()
    table = family_table(rows)
    table["Outcome"] = [f"Take-up ({o})" if o == comp["received"] else view.label(o) for o in rows["outcome"]]
    show_table(view, table, "estimates_compliance", caption="Take-up and complier effects", csv_frame=rows)

# %%
sub = est[est["estimand"] == "subgroup ATE"]
diffs = pd.DataFrame(res.get("subgroup_differences") or [])
if len(sub):
    say("### Pre-specified subgroups\n\nEstimates within each level of the pre-specified subgroup variables, and "
        "the difference between levels. Subgroup estimates are less precise than the overall estimate; a "
        "difference between subgroups is evidence only when its own interval excludes zero.")
    table = family_table(sub)
    table.insert(1, "Subgroup", sub["subgroup"].to_numpy())
    show_table(view, table.drop(columns=["Estimand"]), "estimates_subgroups", caption="Effects within subgroups",
               csv_frame=sub)
if len(diffs):
    show_table(view, pd.DataFrame({
        "Outcome": [view.label(o) for o in diffs["outcome"]],
        "Contrast": [f"{a} minus {b}" for a, b in zip(diffs["subgroup"], diffs["reference"])],
        "Difference": diffs["estimate"], "Std. error": diffs["std_error"],
        f"{level}% CI low": diffs["ci_low"], f"{level}% CI high": diffs["ci_high"],
    }), "subgroup_differences", caption="Differences between subgroup effects", csv_frame=diffs)

# %%
notes = res.get("notes") or []
if notes:
    say("### Notes from the analysis\n\n" + "\n".join(f"- {esc(n)}" for n in notes))

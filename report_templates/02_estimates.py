# %% [markdown]
# ## Average effects

# %% tags=["parameters"]
run_dir = ""
project_dir = ""
compare_to = ""

# %%
import pandas as pd

from report_kit.figures import effect_plot
from report_kit.reporting import RunView, say, show_figure, show_table

view = RunView.open(run_dir, project_dir)
res = view.results
alpha = view.spec.analysis.alpha
est = pd.DataFrame(res["estimates"])
level = round(100 * (1 - alpha))

# %%
say(
    f"Each row is a design-based estimate of the average effect of assignment with its standard error "
    f"and a {level}% confidence interval. Units missing an outcome are left out of that outcome only; "
    "the counts used are shown per arm. Methods and formulas: docs/methods.md."
)

# %%
METHOD_WORDS = {
    "neyman": "Neyman difference in means",
    "blocked_neyman": "block-weighted Neyman",
    "paired": "paired (Imai 2008)",
    "cr2": "difference in means, CR2 cluster SE",
    "horvitz_thompson": "Horvitz–Thompson (cluster totals)",
    "lin_hc2": "Lin covariate-adjusted, HC2",
    "lin_cr2": "Lin covariate-adjusted, CR2",
    "wald_delta": "Wald ratio, delta method",
}


def family_table(rows: pd.DataFrame) -> pd.DataFrame:
    return pd.DataFrame({
        "Outcome": [view.label(o) for o in rows["outcome"]],
        "Estimand": rows["estimand"],
        "Method": [METHOD_WORDS.get(m, m) for m in rows.get("method", rows["estimator"])],
        "Estimate": rows["estimate"],
        "Std. error": rows["std_error"],
        f"{level}% CI low": rows["ci_low"],
        f"{level}% CI high": rows["ci_high"],
        "n treated": rows["n_treated"],
        "n control": rows["n_control"],
    })


main = est[est["estimand"].isin(["ATE", "ITT"]) & est["subgroup"].isna()]
main = main[main["outcome"].isin([o.column for o in view.spec.outcomes])]
for family in ("primary", "secondary", "exploratory"):
    rows = main[[view.family(o) == family for o in main["outcome"]]]
    if len(rows):
        show_table(view, family_table(rows), f"estimates_{family}",
                   caption=f"{family.capitalize()} outcomes", csv_frame=rows)

# %%
if len(main):
    show_figure(view, effect_plot(main, labeler=view.label, level=level), "effects",
                caption=f"Estimates with {level}% confidence intervals; the dashed line marks no effect.")

# %%
other = est[~est.index.isin(main.index)]
if len(other):
    say("### Take-up, complier effects and subgroups")
    table = family_table(other)
    table.insert(1, "Subgroup", other["subgroup"].fillna("all units").to_numpy())
    show_table(view, table, "estimates_other", caption="Noncompliance and pre-specified subgroups",
               csv_frame=other)

# report-kit: multi-arm
# %% [markdown]
# ## Differences between the arms

# %% tags=["parameters"]
run_dir = ""
project_dir = ""

# %%
import pandas as pd

from report_kit.report import RunView, cell_means_plot, contrast_plot, esc, say, show_figure, show_table

view = RunView.open(run_dir, project_dir)
res = view.results
d = res["design"]
label_of = {a["arm"]: a["label"] for a in d["arms"]}
level = view.level
est = pd.DataFrame(res["estimates"])
tests = pd.DataFrame(res["tests"])
intervals = pd.DataFrame(res["intervals"])
mult = pd.DataFrame(res["multiplicity"])

# %%
say("Each contrast compares two arms: the estimated average difference in the outcome had every unit "
    "received the first arm instead of the second, with its design-based standard error and a "
    f"{level}% confidence interval. The unadjusted estimate is pre-specified; the covariate-adjusted "
    "(Lin 2013) estimate follows when covariates were pre-specified. Units missing an outcome are left out "
    "of that outcome only. Methods and formulas: docs/methods/arms.md.")

# %%
METHOD_WORDS = {"neyman": "Difference in means", "blocked_neyman": "Block-weighted", "cr2": "Difference in means, CR2",
                "horvitz_thompson": "Horvitz–Thompson", "lin_hc2": "Lin adjusted, HC2", "lin_cr2": "Lin adjusted, CR2",
                "lin_arms": "Lin adjusted (all arms), HC2", "lin_arms_cr2": "Lin adjusted (all arms), CR2",
                "wald_delta": "Wald ratio",
                "factorial_neyman": "Factorial contrast of cell means",
                "blocked_factorial_neyman": "Factorial contrast of cell means within blocks",
                "cluster_factorial_cr2": "Factorial contrast of cell means, CR2",
                "blocked_cluster_factorial_cr2": "Factorial contrast of cell means within blocks, CR2"}
contrasts = est[est["arm"].notna() & est["subgroup"].isna()]
for outcome in view.spec.outcomes:
    rows = contrasts[contrasts["outcome"] == outcome.column]
    if not len(rows):
        continue
    table = pd.DataFrame({
        "Contrast": [f"{label_of[a]} vs {label_of[b]}" for a, b in zip(rows["arm"], rows["reference"])],
        "Estimand": rows["estimand"],
        "Method": [METHOD_WORDS.get(m, m) for m in rows["method"]],
        "Estimate": rows["estimate"], "Std. error": rows["std_error"],
        f"{level}% CI low": rows["ci_low"], f"{level}% CI high": rows["ci_high"],
        "n arm": rows["n_treated"], "n reference": rows["n_control"],
    })
    show_table(view, table, f"contrasts_{outcome.column}", caption=f"{outcome.label} ({outcome.family})",
               csv_frame=rows)

# %%
main = contrasts[contrasts["estimand"].isin(["ATE", "ITT"]) & contrasts["method"].ne("horvitz_thompson")]
if len(main):
    show_figure(view, contrast_plot(main, arm_label=label_of.get, labeler=view.label, level=level), "contrasts",
                caption=f"Contrasts with {level}% confidence intervals; the dashed line marks no difference.")

# %%
factorial = est[est["factor"].notna()]
if len(factorial):
    clustered = d["mechanism"] in ("cluster", "blocked_cluster")
    variance = ("CR2 standard errors clustered by cluster with Bell–McCaffrey degrees of freedom, the rule of the "
                "two-arm cluster estimate" if clustered else "conservative Neyman standard errors")
    say("### Factorial effects\n\nA main effect is the average, over the levels of the other factor, of the "
        "effect of turning the factor on; the interaction measures how far the combined arm differs from the "
        "sum of the two single effects (half the difference of the factor's effect with and without the other "
        f"factor). Estimates follow Dasgupta, Pillai & Rubin (2015), with {variance}. Each main effect also has "
        "a randomization p-value: only that factor is re-randomized, holding every unit's level of the other "
        "factors, under the sharp null that the factor changes no unit's outcome. These p-values are not "
        "adjusted for multiplicity (the contrast tests above carry the adjustment). An interaction has no "
        "such test, because no interaction null fixes a unit's outcomes in the other cells; read its "
        "confidence interval.")
    factor_tests = tests[tests["factor"].notna()] if "factor" in tests else tests.iloc[0:0]
    p_of = {(t["outcome"], t["factor"]): t["p_value"] for _, t in factor_tests.iterrows()}
    show_table(view, pd.DataFrame({
        "Outcome": [view.label(o) for o in factorial["outcome"]],
        "Effect": [f"{f} ({e})" for f, e in zip(factorial["factor"], factorial["estimand"])],
        "Method": [METHOD_WORDS.get(m, m) for m in factorial["method"]],
        "Estimate": factorial["estimate"], "Std. error": factorial["std_error"],
        f"{level}% CI low": factorial["ci_low"], f"{level}% CI high": factorial["ci_high"],
        "Randomization p": [p_of.get((o, f)) for o, f in zip(factorial["outcome"], factorial["factor"])],
    }), "factorial", caption="Main effects and interaction", csv_frame=factorial)
    if len(factor_tests):
        factor_tests = factor_tests.merge(intervals[intervals["factor"].notna()], on=["outcome", "factor"],
                                          how="left", suffixes=("", "_interval"))
        show_table(view, pd.DataFrame({
            "Outcome": [view.label(o) for o in factor_tests["outcome"]],
            "Factor": list(factor_tests["factor"]),
            "Main effect": factor_tests["observed"], "p-value": factor_tests["p_value"],
            f"{level}% CI low": factor_tests["ci_low"], f"{level}% CI high": factor_tests["ci_high"],
            "Method": factor_tests["method"].str.replace("_", " "), "Assignments": factor_tests["draws"],
        }), "main_effect_tests", caption="Randomization tests of the main effects, with test-inversion intervals",
            csv_frame=factor_tests)
    factors = list((d.get("factors") or {}).items())
    arms_table = pd.DataFrame(res["arms"])
    if len(factors) == 2:
        (first, first_on), (second, second_on) = factors
        for outcome in view.spec.outcomes:
            part = arms_table[arms_table["outcome"] == outcome.column]
            means = dict(zip(part["arm"], part["mean"]))
            show_figure(view, cell_means_plot(means, first=first, second=second, first_on=tuple(first_on),
                                              second_on=tuple(second_on), label=view.label(outcome.column)),
                        f"cell_means_{outcome.column}",
                        caption="Mean outcome in each cell; parallel lines mean the two factors add up.")

# %%
def contrast_names(frame):
    return [f"{label_of[a]} vs {label_of[b]}" for a, b in zip(frame["arm"], frame["reference"])]


sub = est[est["arm"].notna() & est["subgroup"].notna()]
diffs = pd.DataFrame(res.get("subgroup_differences") or [])
if len(sub):
    say("### Pre-specified subgroups\n\nEach contrast within each level of the pre-specified subgroup "
        "variables (the unadjusted design-based estimate on the level's units), then the difference between a "
        "level's contrast and the first level's. These are exploratory: not adjusted for the number of "
        "subgroups, contrasts and outcomes examined, and less precise than the overall contrasts; a difference "
        "between subgroups is evidence only when its own interval excludes zero.")
    show_table(view, pd.DataFrame({
        "Outcome": [view.label(o) for o in sub["outcome"]], "Contrast": contrast_names(sub),
        "Subgroup": sub["subgroup"].to_numpy(), "Estimate": sub["estimate"], "Std. error": sub["std_error"],
        f"{level}% CI low": sub["ci_low"], f"{level}% CI high": sub["ci_high"],
        "n arm": sub["n_treated"], "n reference": sub["n_control"],
    }), "subgroups", caption="Contrasts within subgroups", csv_frame=sub)
if len(diffs):
    show_table(view, pd.DataFrame({
        "Outcome": [view.label(o) for o in diffs["outcome"]], "Contrast": contrast_names(diffs),
        "Subgroups": [f"{a} minus {b}" for a, b in zip(diffs["subgroup"], diffs["subgroup_reference"])],
        "Difference": diffs["estimate"], "Std. error": diffs["std_error"],
        f"{level}% CI low": diffs["ci_low"], f"{level}% CI high": diffs["ci_high"],
    }), "subgroup_differences", caption="Differences between subgroups, per contrast", csv_frame=diffs)

# %% [markdown]
# ## Randomization tests

# %%
say("Each contrast's p-value comes from re-randomizing only the units of the two arms compared, holding the "
    "other units' arms and both arms' sizes (within blocks); the interval collects the constant effects the "
    "test does not reject. The test across all arms uses the between-arm sum of squares "
    "Σ n_k (ȳ_k − ȳ)² under the full randomization: a small p-value says the arms differ somewhere.")
pair_tests = tests[tests["arm"].notna()].merge(intervals, on=["outcome", "arm", "reference"], how="left")
lead = mult[mult["lead"]] if len(mult) else mult
if len(lead):
    pair_tests = pair_tests.merge(lead[["outcome", "arm", "reference", "p_adjusted"]],
                                  on=["outcome", "arm", "reference"], how="left")
else:
    pair_tests["p_adjusted"] = None
show_table(view, pd.DataFrame({
    "Outcome": [view.label(o) for o in pair_tests["outcome"]],
    "Contrast": [f"{label_of[a]} vs {label_of[b]}" for a, b in zip(pair_tests["arm"], pair_tests["reference"])],
    "Statistic": pair_tests["statistic"].str.replace("_", " "),
    "p-value": pair_tests["p_value"], "Adjusted p": pair_tests["p_adjusted"],
    f"{level}% CI low": pair_tests["ci_low"], f"{level}% CI high": pair_tests["ci_high"],
    "Method": pair_tests["method_x"].str.replace("_", " "),
}), "contrast_tests", caption="Randomization tests and test-inversion intervals per contrast", csv_frame=pair_tests)
omni = tests[tests["statistic"] == "between_arms"]
show_table(view, pd.DataFrame({
    "Outcome": [view.label(o) for o in omni["outcome"]],
    "Between-arm sum of squares": omni["observed"], "p-value": omni["p_value"],
    "Method": omni["method"].str.replace("_", " "), "Assignments": omni["draws"],
}), "omnibus_tests", caption="Test across all arms", csv_frame=omni)

# %%
notes = res.get("notes") or []
if notes:
    say("### Notes from the analysis\n\n" + "\n".join(f"- {esc(n)}" for n in notes))

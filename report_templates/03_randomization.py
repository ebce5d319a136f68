# report-kit: two-arm
# %% [markdown]
# ## Randomization tests

# %% tags=["parameters"]
run_dir = ""
project_dir = ""

# %%

import pandas as pd

from report_kit.report import RunView, esc, fmt_count, fmt_p, p_phrase, randomization_plot, say, show_figure, show_table

view = RunView.open(run_dir, project_dir)
res = view.results
d = res["design"]
tests = pd.DataFrame(res.get("tests") or [])
level = view.level

# %%
rerandomized = d.get("rerandomization")
if rerandomized:
    rate = ("exact" if rerandomized["acceptance_rate_method"] == "exact"
            else f"estimated from {int(rerandomized['candidates']):,} random candidates")
    say("The assignment was **rerandomized** (Morgan & Rubin 2012): candidate assignments were drawn from "
        "design.seed until the Mahalanobis distance of the arm means of "
        f"{', '.join(esc(c) for c in rerandomized['covariates'])} was at most "
        f"{rerandomized['max_distance']:g} (observed: {rerandomized['observed_distance']:.3g}). "
        f"{100 * rerandomized['acceptance_rate']:.1f}% of the assignments are acceptable ({rate}); the tests "
        "and test-inversion intervals below run over the acceptable assignments only, while Neyman standard "
        "errors ignore the rerandomization and are conservative.")
if d.get("inference_method") == "exact":
    how = (f"all {fmt_count(d['n_assignments'], d.get('n_assignments_log10'))} "
           f"{'acceptable ' if rerandomized else ''}assignments the design allows were enumerated, so the "
           "p-values are exact")
elif rerandomized:
    how = (f"{d['draws']:,} acceptable assignments were drawn at random by the same accept/reject rule "
           f"(seed {view.spec.analysis.seed}) and each p-value carries a Monte Carlo standard error; "
           "p = (1 + #{at least as extreme}) / (1 + draws)")
else:
    how = (f"the design allows {fmt_count(d['n_assignments'], d.get('n_assignments_log10'))} assignments, so "
           f"{d['draws']:,} were drawn at random (seed {view.spec.analysis.seed}) and each p-value carries a "
           "Monte Carlo standard error; p = (1 + #{at least as extreme}) / (1 + draws)")
say("Each test asks how surprising the observed statistic would be if the programme had no effect on any "
    "unit (Fisher's sharp null), using the assignment mechanism actually used: "
    f"{how}. Two-sided tests count assignments at least as far from the null mean as the observed one.")
if len(tests) and "detail" in tests and tests["detail"].fillna("").str.startswith("exact").any():
    say("Tests shown as exact with 0 assignments used were computed from the exact null distribution of "
        "their statistic without listing assignments (the outcome's values lie on a lattice; see "
        "docs/methods/exact.md), so their p-values are exact too.")

# %%
STAT_WORDS = {"mean_difference": "difference in means", "rank_sum": "rank sum", "studentized": "studentized difference",
              "ks": "Kolmogorov–Smirnov distance"}
if len(tests):
    show_table(view, pd.DataFrame({
        "Outcome": [view.label(o) for o in tests["outcome"]],
        "Statistic": [STAT_WORDS.get(s, s) for s in tests["statistic"]],
        "Alternative": tests["alternative"],
        "Observed": tests["observed"],
        "p-value": [fmt_p(p) for p in tests["p_value"]],
        "Assignments used": tests["draws"],
        "MC std. error": [None if v is None or pd.isna(v) else float(v) for v in tests["mc_std_error"]],
    }), "tests", caption="Fisher randomization tests of no effect", csv_frame=tests)

# %%
intervals = pd.DataFrame(res.get("intervals") or [])
grid_note = ""
if len(intervals) and "detail" in intervals and intervals["detail"].fillna("").str.startswith("exact").any():
    grid_note = (" Where the ends are exact grid values, they are the smallest and largest effects not rejected by "
                 "an exact p-value among those that keep the outcome on its lattice (multiples of its step; see "
                 "docs/methods/exact.md); the Hodges–Lehmann estimate still comes from the random assignments.")
if len(intervals):
    show_table(view, pd.DataFrame({
        "Outcome": [view.label(o) for o in intervals["outcome"]],
        f"{level}% interval, low": intervals["ci_low"],
        f"{level}% interval, high": intervals["ci_high"],
        "Hodges–Lehmann estimate": intervals["hodges_lehmann"],
        **({"Ends": ["exact grid values" if str(d).startswith("exact") else "random assignments"
                     for d in intervals["detail"]]} if grid_note else {}),
    }), "intervals", caption="Constant effects not rejected by the two-sided difference-in-means test",
        csv_frame=intervals,
        note="The interval collects every constant additive effect that the two-sided difference-in-means "
             "randomization test does not reject, whatever statistic or alternative the outcome's own test uses; "
             "the Hodges–Lehmann estimate is the effect at which that test is most compatible." + grid_note)

# %%
rr_intervals = pd.DataFrame(res.get("rerandomization_intervals") or [])
if len(rr_intervals):
    show_table(view, pd.DataFrame({
        "Outcome": [view.label(o) for o in rr_intervals["outcome"]],
        "Difference in means": rr_intervals["estimate"],
        f"{level}% interval, low": rr_intervals["ci_low"],
        f"{level}% interval, high": rr_intervals["ci_high"],
        "Neyman interval, low": rr_intervals["neyman_ci_low"],
        "Neyman interval, high": rr_intervals["neyman_ci_high"],
        "R² of the covariates": rr_intervals["r_squared"],
    }), "rerandomization_intervals", caption="Large-sample intervals that account for the rerandomization",
        csv_frame=rr_intervals,
        note="Li, Ding & Rubin (2018): under rerandomization the difference in means is a normal plus a "
             "truncated-normal part; the interval uses that law (conservative, like the Neyman interval, "
             "whose bounds are shown for comparison). Outcomes with missing values are left out.")

# %%
arrays = view.arrays()
for o in view.spec.outcomes:
    key = f"null::{o.column}"
    if o.family != "primary" or key not in arrays:
        continue
    row = tests[tests["outcome"] == o.column].iloc[0]
    if row["method"] == "exact" and int(row["draws"]) == 0:  # exact law; the plot shows the shared draws
        count = f"{len(arrays[key]):,} random assignments (the p-value is exact)"
    else:
        count = "every assignment" if row["method"] == "exact" else f"{int(row['draws']):,} random assignments"
    fig = randomization_plot(arrays[key], float(arrays[f"observed::{o.column}"][0]), label=o.label,
                             statistic=row["statistic"], method=row["method"], count_text=count)
    show_figure(view, fig, f"randomization_{o.column}",
                caption=f"{o.label}: the statistic under every re-randomization if there were no effect "
                        f"(grey) and as observed (line); {p_phrase(row['p_value'])}.")

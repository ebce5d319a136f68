# report-kit: two-arm
# %% [markdown]
# ## Balance on baseline covariates

# %% tags=["parameters"]
run_dir = ""
project_dir = ""
compare_to = ""

# %%
import pandas as pd

from report_kit.report.figures_checks import plot_balance
from report_kit.report.view import RunView, fmt_p, p_phrase, say, show_figure, show_table

view = RunView.open(run_dir, project_dir)
res = view.results
bal = res.get("balance") or {"covariates": [], "omnibus": {}}

# %%
if bal["covariates"]:
    cov = pd.DataFrame(bal["covariates"])
    show_table(view, pd.DataFrame({
        "Covariate": cov["name"],
        "Mean, treated": cov["mean_treated"],
        "Mean, control": cov["mean_control"],
        "Std. difference": cov["std_diff"],
        "Variance ratio": cov["variance_ratio"],
        "Missing (T / C)": [f"{a} / {b}" for a, b in zip(cov["missing_treated"], cov["missing_control"])],
        "Imbalance": cov["flag"],
    }), "balance", caption="Baseline means by arm", csv_frame=cov,
        note="Standardized difference = difference in means over sqrt((s1² + s0²)/2). Imbalance: small below 0.1, "
             "moderate from 0.1 to 0.25, large above 0.25 in absolute value (common practice, not a test). "
             "A variance ratio far from 1 (for example below 0.5 or above 2, common practice) means the arms "
             "differ in spread even when the means agree.")
    omni = bal["omnibus"]
    if omni.get("p_value") is not None:
        reference = "every assignment" if omni["method"] == "exact" else f"{omni['draws']:,} random assignments"
        say(f"**Joint check.** The Mahalanobis distance between the arms' covariate means is "
            f"{omni['statistic']:.3f}; under the real assignment mechanism "
            f"({reference}) "
            f"a distance at least this large has probability {fmt_p(omni['p_value']).replace('< ', 'below ')} (Morgan & Rubin 2012). "
            "A small value points to chance imbalance or a problem in how the assignment was carried out.")
    show_figure(view, plot_balance(bal), "balance", caption="Standardized differences by covariate.")
else:
    say("No baseline covariates were pre-specified, so there is no balance table.")

# %% [markdown]
# ## Participant flow

# %%
flow = pd.DataFrame(res.get("flow") or [])
if len(flow):
    show_table(view, pd.DataFrame({
        "Outcome": [view.label(o) for o in flow["outcome"]],
        "Arm": flow["arm"],
        "Randomized": flow["randomized"],
        "Received treatment": flow["received_treatment"],
        "Outcome observed": flow["outcome_observed"],
        "Lost": flow["lost"],
        "Analysed": flow["analysed"],
    }), "flow", caption="Units at each stage, by arm and outcome", csv_frame=flow)

# %% [markdown]
# ## Attrition

# %%
att = res.get("attrition")
if att:
    lost_if = [view.label(c) for c in att.get("attrited_if_missing", [])]
    rule = (f"its {lost_if[0].lower()} is missing" if len(lost_if) == 1
            else "any of " + ", ".join(x.lower() for x in lost_if) + " is missing")
    say(f"Outcomes are missing for {100 * att['rate_treated']:.1f}% of treated and "
        f"{100 * att['rate_control']:.1f}% of control units (a unit counts as lost when {rule}). "
        f"Randomization test of equal attrition: {p_phrase(att['p_value'])}.")
    bounds = pd.DataFrame(att.get("bounds") or [])
    if len(bounds):
        words = {"lee": "Lee (2009) trimming", "manski": "Manski worst case (declared range)"}
        show_table(view, pd.DataFrame({
            "Outcome": [view.label(o) for o in bounds["outcome"]],
            "Bounds": [words.get(m, m) for m in bounds["method"]],
            "Lower": bounds["lower"], "Upper": bounds["upper"],
        }), "attrition_bounds", caption="Bounds on the average effect allowing for attrition", csv_frame=bounds,
            note="These are identification bounds: the range of effects consistent with the data if the missing "
                 "outcomes were as favourable or unfavourable as possible, computed on all units pooled (blocks "
                 "and clusters ignored) and without sampling error. Lee bounds assume attrition is monotone in "
                 "treatment; Manski bounds assume only the outcome's declared range.")

# %% [markdown]
# ## Several outcomes

# %%
mult = pd.DataFrame(res.get("multiplicity") or [])
if len(mult):
    lead = view.spec.analysis.multiplicity
    names = {"holm": "Holm", "bh": "Benjamini–Hochberg", "westfall_young": "Westfall–Young"}
    wide = mult.pivot_table(index=["outcome", "family"], columns="method", values="p_adjusted",
                            aggfunc="first", sort=False).reset_index()
    raw = mult.drop_duplicates("outcome").set_index("outcome")["p_value"]
    table = pd.DataFrame({"Outcome": [view.label(o) for o in wide["outcome"]], "Family": wide["family"],
                          "p (unadjusted)": [fmt_p(raw[o]) for o in wide["outcome"]]})
    for method in ("holm", "bh", "westfall_young"):
        if method in wide.columns:
            title = names[method] + (" (pre-specified)" if method == lead else "")
            table[title] = [fmt_p(v) for v in wide[method]]
    show_table(view, table, "multiplicity", caption="Adjusted p-values within each family", csv_frame=mult,
               note="Adjustments are made within each family of outcomes (primary, secondary, exploratory). "
                    "Holm and Westfall–Young control the family-wise error rate; Benjamini–Hochberg the false "
                    "discovery rate.")

# %% [markdown]
# ## Power of the study as run

# %%
power = res.get("power") or {}
as_run = pd.DataFrame(power.get("as_run") or [])
if len(as_run):
    show_table(view, pd.DataFrame({
        "Outcome": [view.label(o) for o in as_run["outcome"]],
        "Std. error": as_run["std_error"],
        "Minimum detectable effect": as_run["mde"],
        "MDE in control SDs": as_run["mde_std"],
    }), "power", caption=f"Smallest true effect detectable with {round(100 * power.get('target_power', 0.8))}% power",
        csv_frame=as_run,
        note="From the realized standard error of the main estimate (Bloom 1995). Power to detect the observed "
             "effect is not shown: it restates the p-value.")

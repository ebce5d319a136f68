# report-kit: two-arm
# %% [markdown]
# ## Balance on baseline covariates

# %% tags=["parameters"]
run_dir = ""
project_dir = ""

# %%

import pandas as pd

from report_kit.report import RunView, esc, flow_diagram, fmt_p, p_phrase, plot_balance, say, show_figure, show_table

view = RunView.open(run_dir, project_dir)
res = view.results
bal = res.get("balance") or {"covariates": [], "omnibus": {}}
control_word, treated_word = view.spec.design.arm_labels

# %%
if bal["covariates"]:
    cov = pd.DataFrame(bal["covariates"])
    show_table(view, pd.DataFrame({
        "Covariate": cov["name"],
        f"Mean, {treated_word}": cov["mean_treated"],
        f"Mean, {control_word}": cov["mean_control"],
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
arm_words = {"control": control_word, "treated": treated_word}
# the table first: it may break across pages, so the section never leaves a page half empty;
# the diagram (which cannot break) follows it
if len(flow):
    show_table(view, pd.DataFrame({
        "Outcome": [view.label(o) for o in flow["outcome"]],
        "Arm": [arm_words.get(a, a) for a in flow["arm"]],
        "Randomized": flow["randomized"],
        "Received treatment": flow["received_treatment"],
        "Outcome observed": flow["outcome_observed"],
        "Lost": flow["lost"],
        "Analysed": flow["analysed"],
    }), "flow", caption="Units at each stage, by arm and outcome", csv_frame=flow)
if len(flow):
    lead = next((o for o in view.spec.outcomes if o.family == "primary"), view.spec.outcomes[0])
    show_figure(view, flow_diagram(res["flow"], lead.column, arm_labels=view.spec.design.arm_labels,
                                   enrolment=res.get("enrolment"),
                                   show_received=res.get("compliance") is not None),
                "participant_flow",
                caption=f"Participant flow (CONSORT-style stages) for {lead.label}: units at each stage by arm.")

# %% [markdown]
# ## Attrition

# %%
att = res.get("attrition")
if att:
    lost_if = [esc(view.label(c)) for c in att.get("attrited_if_missing", [])]
    rule = (f"its outcome “{lost_if[0]}” is missing" if len(lost_if) == 1  # user labels kept as written
            else "any of " + ", ".join(f"“{x}”" for x in lost_if) + " is missing")
    say(f"Outcomes are missing for {100 * att['rate_treated']:.1f}% of the {esc(treated_word)} arm and "
        f"{100 * att['rate_control']:.1f}% of the {esc(control_word)} arm (a unit counts as lost when {rule}). "
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
                 "outcomes were as favourable or unfavourable as possible, without sampling error. In blocked "
                 "designs Lee bounds are computed within blocks and combined with the weights of the main "
                 "estimate; they assume attrition is monotone in treatment. Manski bounds pool all units and "
                 "assume only the outcome's declared range.")
    for sentence in att.get("bounds_notes") or []:
        say(esc(sentence))

# %% [markdown]
# ## Several outcomes

# %%
mult = pd.DataFrame(res.get("multiplicity") or [])
table = view.adjusted_p_table()
if len(table):
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

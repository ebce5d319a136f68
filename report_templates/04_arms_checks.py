# report-kit: multi-arm
# %% [markdown]
# ## Checks: balance, participant flow, attrition and precision

# %% tags=["parameters"]
run_dir = ""
project_dir = ""

# %%
import pandas as pd

from report_kit.report import RunView, esc, fmt_p, say, show_table

view = RunView.open(run_dir, project_dir)
res = view.results
label_of = {a["arm"]: a["label"] for a in res["design"]["arms"]}
arms = [a["arm"] for a in res["design"]["arms"]]

# %%
cov = res["balance"]["covariates"]
if cov:
    say("Baseline covariates by arm. The p-value tests whether the arms differ more than randomization "
        "alone would make them (between-arm sum of squares under the full randomization).")
    show_table(view, pd.DataFrame([{"Covariate": c["name"], **{label_of[a]: c["means"][a] for a in arms},
                                    "p-value": c["p_value"]} for c in cov]), "balance", caption="Covariate balance")
else:
    say("No baseline covariates were pre-specified, so there is no balance table.")

# %%
flow = pd.DataFrame(res["flow"])
show_table(view, pd.DataFrame({
    "Outcome": [view.label(o) for o in flow["outcome"]],
    "Arm": [label_of[a] for a in flow["arm"]],
    "Randomized": flow["randomized"], "Outcome observed": flow["outcome_observed"], "Lost": flow["lost"],
}), "flow", caption="Participant flow by arm", csv_frame=flow)
att = res["attrition"]
rates = ", ".join(f"{esc(label_of[r['arm']])} {100 * r['rate']:.1f}%" for r in att["rates"])
test = att.get("test")
say(f"Share of units missing any outcome: {rates}."
    + ("" if test is None else f" Test of equal attrition across arms: p {fmt_p(test['p_value'])}."))

# %%
table = view.adjusted_p_table(arm_label=label_of.get)
if len(table):
    say("### Several outcomes and contrasts\n\nThe contrasts of one outcome are tested together with the other "
        "outcomes of its family (primary, secondary, exploratory); each column adjusts the randomization "
        "p-values within the family. Holm and Westfall–Young control the family-wise error rate, "
        "Benjamini–Hochberg the false discovery rate.")
    show_table(view, table, "multiplicity", caption="Adjusted p-values within each family",
               csv_frame=pd.DataFrame(res.get("multiplicity") or []))

# %%
power = pd.DataFrame(res["power"]["as_run"])
if len(power):
    say(f"Minimum detectable difference of each contrast as run (at {100 * res['power']['target_power']:.0f}% "
        f"power, alpha {res['power']['alpha']:g}), from the contrast's standard error (Bloom 1995).")
    show_table(view, pd.DataFrame({
        "Outcome": [view.label(o) for o in power["outcome"]],
        "Contrast": [f"{label_of[a]} vs {label_of[b]}" for a, b in zip(power["arm"], power["reference"])],
        "Std. error": power["std_error"], "MDE": power["mde"],
    }), "power", caption="Precision of each contrast", csv_frame=power)

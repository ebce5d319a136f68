# %% [markdown]
# ## Deviations from the plan

# %% tags=["parameters"]
run_dir = ""
project_dir = ""

# %%
import pandas as pd

from report_kit.report import RunView, callout, esc, say, show_table

view = RunView.open(run_dir, project_dir)

# %%
dev = view.plan
if not dev["locked"]:
    say("No plan lock exists for this project: the analysis plan (design.yaml) was not frozen with "
        "`report-kit lock` before outcomes were analysed, so this report cannot show whether it changed.")
elif not dev["changes"]:
    say(f"The plan was locked on {esc(dev['locked_at'])} (design.yaml SHA-256 "
        f"<code>{esc(dev['locked_sha256'][:16])}…</code>). **No key has changed since the lock**"
        + (" (only comments or layout differ)." if dev["text_changed"] else "."))
else:
    callout(f"<b>{len(dev['changes'])} key(s) of the analysis plan changed since it was locked on "
            f"{esc(dev['locked_at'])}.</b> Each change below is a deviation from the plan and should be "
            "justified in the write-up.", "caution")
    show_table(view, pd.DataFrame({
        "Key": [c["key"] for c in dev["changes"]],
        "Change": [c["kind"] for c in dev["changes"]],
        "Locked plan": [str(c["old"]) for c in dev["changes"]],
        "This run": [str(c["new"]) for c in dev["changes"]],
    }), "plan_deviations", caption="Deviations from the locked plan")
if dev.get("locked") and dev.get("lock_intact") is False:
    callout("<b>The lock file was edited after locking</b>: its text no longer matches its recorded SHA-256.", "caution")
handled = [h for h in view.results.get("data_handling", []) if h["changes_plan"]]
if handled:
    items = "".join(f"<li>{esc(h['statement'])}</li>" for h in handled)
    callout(f"<b>Data handling declared in the plan changed the analysed units</b><ul>{items}</ul>", "caution")
if dev.get("runs_before_lock"):
    say(f"Note: {len(dev['runs_before_lock'])} run(s) existed before the plan was locked.")

# %%
diff = view.changes
if diff is not None:
    say(f"## Changes since the previous run\n\nCompared with run <code>{esc(diff['run_a'])}</code>.")
    if diff["conclusions"]:
        items = "".join(f"<li><b>{esc(c['message'])}</b></li>" for c in diff["conclusions"])
        callout(f"<b>Conclusions that changed</b><ul>{items}</ul>", "change")
    else:
        say("**No conclusion changed**: no p-value crossed alpha, no confidence interval started or stopped "
            "including zero, and no estimate changed sign.")
    changed = [c for c in diff["inputs"] if c["status"] != "unchanged"]
    if not changed:
        say("The inputs are identical to the previous run's.")
    if diff["design_changes"]:
        show_table(view, pd.DataFrame({
            "Key": [c["key"] for c in diff["design_changes"]],
            "Previous run": [str(c.get("old")) for c in diff["design_changes"]],
            "This run": [str(c.get("new")) for c in diff["design_changes"]],
        }), "changed_spec", caption="Changes to design.yaml since the previous run")
    for change in changed:
        t, where = change["table"], f"<code>{esc(change['path'])}</code>"
        if t is None:
            say(f"Input {where}: {esc(change['status'])}" + (f" ({esc(change['note'])})" if change["note"] else "") + ".")
            continue
        say(f"Input {where}: {t['n_units_added']} unit(s) added, {t['n_units_removed']} removed, "
            f"{t['n_changed_cells']} cell(s) changed (rows {t['rows_a']} → {t['rows_b']}).")
        if t["units_removed"] or t["units_added"]:
            say("Units removed: " + (", ".join(esc(u) for u in t["units_removed"]) or "none") +
                "; units added: " + (", ".join(esc(u) for u in t["units_added"]) or "none") + ".")
        if t["cells"]:
            cells = pd.DataFrame(t["cells"][:25])
            show_table(view, cells, f"changed_cells_{change['path'].rsplit('/', 1)[-1].rsplit('.', 1)[0]}",
                       caption=f"Changed cells in {change['path']}" + (" (first 25)" if len(t["cells"]) > 25 else ""))
    moved = [c for c in diff["results"]["changed"] if c["difference"] is not None]

    def readable(change: dict) -> str:
        key = change["key"]
        if "outcome" not in key:  # e.g. balance.covariates rows: name the covariate
            return f"{change['section']}: {key['name']}" if key.get("name") is not None else change["section"]
        parts = [view.label(key["outcome"])]
        parts += [str(key[k]) for k in ("estimand", "subgroup", "statistic", "method", "family") if key.get(k)]
        return f"{change['section']}: " + " · ".join(parts)

    if moved:
        show_table(view, pd.DataFrame({
            "Result": [readable(c) for c in moved[:30]],
            "Field": [c["field"] for c in moved[:30]],
            "Before": [c["old"] for c in moved[:30]],
            "Now": [c["new"] for c in moved[:30]],
            "Change": [c["difference"] for c in moved[:30]],
        }), "changed_results", caption="Results that moved" + (f" (first 30 of {len(moved)})" if len(moved) > 30 else ""))

# %% [markdown]
# ## Where these numbers come from

# %% tags=["parameters"]
run_dir = ""
project_dir = ""

# %%
import pandas as pd

from report_kit.report import RunView, say, show_table

view = RunView.open(run_dir, project_dir)
res = view.results

# %%
say(
    f"Produced by report-kit {view.tool_version} from the design spec and the input files below. "
    "The run folder holds `manifest.json` (SHA-256 of every input and output, seeds, software "
    "versions, command line, times) and `ro-crate-metadata.json` (an RO-Crate 1.1 description). "
    "`report-kit verify` re-runs the analysis from the recorded inputs and compares every number."
)
inputs = pd.DataFrame(res["inputs"])
show_table(view, pd.DataFrame({"File": inputs["path"], "Rows": inputs["rows"],
                               "SHA-256 (first 16)": [h[:16] for h in inputs["sha256"]]}),
           "inputs", caption="Input files")
seeds = [("Randomization-inference seed (analysis.seed)", str(view.spec.analysis.seed)),
         ("Assignment seed (design.seed)", "—" if view.spec.design.seed is None else str(view.spec.design.seed))]
show_table(view, pd.DataFrame(seeds, columns=["Seed", "Value"]), "seeds", caption="Seeds")

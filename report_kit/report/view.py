"""What the report notebooks call: load a run's results, show and save tables and figures.

Owns the presentation helpers only; no statistic is computed here. Every table
shown is also written to ``tables/<name>.csv`` and every figure to
``figures/<name>.png`` and ``.svg`` in the run folder.
"""

from __future__ import annotations

import base64
import html
import json
import math
from dataclasses import dataclass
from pathlib import Path

import matplotlib
import numpy as np
import pandas as pd

from report_kit.audit.compare import CHANGES_NAME
from report_kit.audit.provenance import INPUTS_DIR
from report_kit.inputs.spec import SPEC_FILENAME, load_spec

CAUTIONS = (
    "Statistical significance is not proof of benefit or of safety: a small p-value says the data "
    "would be surprising if the programme had no effect, not that the effect is large, important or "
    "free of harm. Read every estimate with its confidence interval.",
    "Trials that involve people follow their ethics approval, their consent procedures and local "
    "regulations; nothing in this report replaces them.",
    "This report applies the analysis plan written in design.yaml{plan_status}. Where the study's "
    "statistician or its registered protocol say otherwise, defer to them.",
)

#: Characters that HTML or Markdown would read as markup, as numeric character references.
_MARKUP = {ord(c): f"&#{ord(c)};" for c in "&<>\"'`*_[]()#!|{}~\\$"}


def esc(text) -> str:
    """User-supplied text made safe for HTML and for Markdown: every markup character as an entity.

    ``<script>`` becomes ``&#60;script&#62;`` and ``[a](http://x)`` cannot become
    a link, so the text reaches the page only as text, in an HTML fragment and in
    a Markdown paragraph alike. ``None`` becomes an empty string.
    """
    return "" if text is None else str(text).translate(_MARKUP)


def plan_status(deviations: dict) -> str:
    """The clause saying whether the plan was locked and kept, for the third caution."""
    if not deviations.get("locked"):
        return ", which was not locked before the analysis (see Deviations from the plan)"
    changes = len(deviations.get("changes") or [])
    when = esc(deviations.get("locked_at") or "an earlier date")
    if changes == 0:
        return f", locked on {when} and unchanged since"
    return f", locked on {when}; {changes} key(s) changed since — see Deviations from the plan"


def cautions(deviations: dict) -> tuple[str, ...]:
    """The report's standing cautions, the last one stating the plan-lock status."""
    return CAUTIONS[:-1] + (CAUTIONS[-1].format(plan_status=plan_status(deviations)),)


@dataclass(frozen=True, kw_only=True)
class RunView:
    """A run folder as the notebooks see it: ``results.json``, the recorded spec, ``changes.json``.

    Everything a notebook shows comes from here; the view selects and labels
    what the analysis stored, it computes no statistic.
    """

    run_dir: Path
    project_dir: Path
    results: dict
    spec: object
    changes: dict | None = None

    @classmethod
    def open(cls, run_dir: str | Path, project_dir: str | Path) -> RunView:
        run_dir, project_dir = Path(run_dir), Path(project_dir)
        results = json.loads((run_dir / "results.json").read_text(encoding="utf-8"))
        recorded = run_dir / INPUTS_DIR / SPEC_FILENAME
        spec = load_spec(recorded) if recorded.exists() else load_spec(project_dir)
        changes_path = run_dir / CHANGES_NAME
        changes = json.loads(changes_path.read_text(encoding="utf-8")) if changes_path.is_file() else None
        return cls(run_dir=run_dir, project_dir=project_dir, results=results, spec=spec, changes=changes)

    @property
    def level(self) -> int:
        """The confidence level in percent, from ``analysis.alpha``."""
        return round(100 * (1 - self.spec.analysis.alpha))

    @property
    def tool_version(self) -> str:
        from report_kit import __version__

        return __version__

    @property
    def plan(self) -> dict:
        """The ``plan`` section (deviations from the locked plan); unlocked when absent."""
        return self.results.get("plan") or {"locked": False, "changes": []}

    def arrays(self) -> dict[str, np.ndarray]:
        folder = self.run_dir / "analysis"
        if not folder.is_dir():
            return {}
        return {p.stem.replace("__", "::", 1): np.load(p, allow_pickle=False) for p in sorted(folder.glob("*.npy"))}

    def label(self, column: str) -> str:
        for o in self.spec.outcomes:
            if o.column == column:
                return o.label
        return column

    def family(self, column: str) -> str | None:
        for o in self.spec.outcomes:
            if o.column == column:
                return o.family
        return None

    def estimates(self) -> pd.DataFrame:
        """``results["estimates"]`` as a frame (``role`` filled with "" for older runs)."""
        frame = pd.DataFrame(self.results.get("estimates") or [])
        if len(frame) and "role" not in frame:
            frame["role"] = ""
        return frame

    def main_estimates(self) -> pd.DataFrame:
        """Whole-sample ATE/ITT rows of the spec's outcomes, by outcome order then role."""
        est = self.estimates()
        if not len(est):
            return est
        order = {o.column: k for k, o in enumerate(self.spec.outcomes)}
        main = est[est["estimand"].isin(["ATE", "ITT"]) & est["subgroup"].isna() & est["outcome"].isin(order)]
        key = {i: (order[main.at[i, "outcome"]], ROLE_ORDER.get(main.at[i, "role"], 9), i) for i in main.index}
        return main.loc[sorted(main.index, key=key.get)]

    def lead_estimates(self) -> pd.DataFrame:
        """The pre-specified (``role == "lead"``) row of each outcome."""
        main = self.main_estimates()
        return main[main["role"] == "lead"] if len(main) else main

    def take_up(self) -> pd.DataFrame:
        """The first stage (``role == "take_up"``) and the CACE rows."""
        est = self.estimates()
        if not len(est):
            return est
        return est[(est["role"] == "take_up") | (est["estimand"] == "CACE")]

    def multiplicity_table(self) -> pd.DataFrame:
        """``results["multiplicity_table"]`` as a frame, one row per outcome (per contrast with several arms)."""
        return pd.DataFrame(self.results.get("multiplicity_table") or [])

    def adjusted_p_table(self, arm_label=None) -> pd.DataFrame:
        """The multiplicity table as the report shows it: a column per adjustment, the pre-specified one marked.

        ``arm_label`` (arm -> label) adds a "Contrast" column for multi-arm runs.
        """
        wide = self.multiplicity_table()
        if not len(wide):
            return wide
        table = pd.DataFrame({"Outcome": [self.label(o) for o in wide["outcome"]]})
        if arm_label is not None and "arm" in wide:
            table["Contrast"] = [f"{arm_label(a)} vs {arm_label(r)}" for a, r in zip(wide["arm"], wide["reference"])]
        table["Family"] = wide["family"]
        table["p (unadjusted)"] = [fmt_p(p) for p in wide["p_value"]]
        for method, title in ADJUSTMENT_NAMES.items():
            if any(method in adjusted for adjusted in wide["adjusted"]):
                lead = (wide["lead_method"] == method).any()
                table[title + (" (pre-specified)" if lead else "")] = [fmt_p(a.get(method)) for a in wide["adjusted"]]
        return table


#: Column titles of the adjustments in the multiplicity table.
ADJUSTMENT_NAMES = {"holm": "Holm", "bh": "Benjamini–Hochberg", "westfall_young": "Westfall–Young"}


#: Order of the rows of one outcome in the estimates tables.
ROLE_ORDER = {"lead": 0, "adjusted": 1, "check": 2, "": 3, "take_up": 4}


def fmt(value, digits: int = 3) -> str:
    """Format a number for a table cell: fixed significant digits, '—' for missing."""
    if value is None or (isinstance(value, float) and not np.isfinite(value)):
        return "—"
    if isinstance(value, (int, np.integer)) and not isinstance(value, bool):
        return f"{int(value):,}"
    if isinstance(value, float) and abs(value) >= 1e5:
        return f"{value:,.0f}"
    return f"{value:.{digits}g}" if abs(value) < 1e-3 and value != 0 else f"{value:,.{digits}f}"


def fmt_count(digits: str | None, log10: float | None = None) -> str:
    """A count of assignments for a reader: ``12,870`` when short, ``≈ 10^4,301`` when huge.

    ``digits`` is ``results.json``'s ``n_assignments`` (a string of digits or
    ``None``) and ``log10`` its ``n_assignments_log10``. Never prints more than
    20 digits in a row.
    """
    if digits is not None and len(str(digits)) <= 15:
        return f"{int(digits):,}"
    if log10 is None:
        return "more than can be written out" if digits is None else f"≈ 10^{len(str(digits)) - 1:,}"
    exponent = int(math.floor(float(log10)))
    mantissa = 10 ** (float(log10) - exponent)
    if mantissa >= 9.95:
        mantissa, exponent = 1.0, exponent + 1
    return f"≈ {mantissa:.1f} × 10^{exponent:,}"


def fmt_p(p) -> str:
    """A p-value for a table cell: three decimals, '< 0.001', '—' when missing."""
    if p is None or not np.isfinite(p):
        return "—"
    return "< 0.001" if p < 0.001 else f"{p:.3f}"


def p_phrase(p) -> str:
    """'p = 0.058' or 'p < 0.001' for running text."""
    text = fmt_p(p)
    return f"p {text}" if text.startswith("<") else f"p = {text}"


def _noise_floor(column: pd.Series) -> float:
    """Below this a float cell of the column is shown as 0: 1e-9 of the column's largest magnitude."""
    values = pd.to_numeric(column, errors="coerce").to_numpy(dtype=float)
    finite = np.abs(values[np.isfinite(values)])
    return 1e-9 * float(finite.max()) if finite.size else 0.0


def table_html(frame: pd.DataFrame, *, caption: str = "", note: str = "", numeric_digits: int = 3) -> str:
    """A plain HTML table in the report's own style (class ``rk-table``)."""
    head = "".join(f"<th>{html.escape(str(c))}</th>" for c in frame.columns)
    floor = [_noise_floor(frame.iloc[:, j]) for j in range(frame.shape[1])]
    body = []
    for _, row in frame.iterrows():
        cells = []
        for j, value in enumerate(row):
            if isinstance(value, float) and abs(value) < floor[j]:
                value = 0.0   # rounding noise of a search (e.g. an interval end at 0 found as -3e-13)
            text = value if isinstance(value, str) else fmt(value, numeric_digits)
            cls = ' class="num"' if not isinstance(value, str) else ""
            cells.append(f"<td{cls}>{html.escape(str(text))}</td>")
        body.append("<tr>" + "".join(cells) + "</tr>")
    cap = f'<p class="rk-tcap">{html.escape(caption)}</p>' if caption else ""
    foot = f'<p class="rk-note">{html.escape(note)}</p>' if note else ""
    table = f'<table class="rk-table"><thead><tr>{head}</tr></thead><tbody>{"".join(body)}</tbody></table>'
    size = "rk-long" if len(frame) > 3 else "rk-short"   # a longer table may break across pages
    return f'<div class="rk-tablebox {size}">{cap}{table}{foot}</div>'


def show_table(view: RunView, frame: pd.DataFrame, name: str, *, caption: str = "", note: str = "",
               csv_frame: pd.DataFrame | None = None) -> None:
    """Write ``tables/<name>.csv`` (full precision) and display the table."""
    from IPython.display import HTML, display

    tables = view.run_dir / "tables"
    tables.mkdir(exist_ok=True)
    (csv_frame if csv_frame is not None else frame).to_csv(tables / f"{name}.csv", index=False)
    display(HTML(table_html(frame, caption=caption, note=note)))


def show_figure(view: RunView, fig, name: str, *, caption: str = "") -> None:
    """Save ``figures/<name>.png`` and ``.svg`` and display the PNG."""
    from IPython.display import HTML, display

    figures = view.run_dir / "figures"
    figures.mkdir(exist_ok=True)
    png = figures / f"{name}.png"
    with matplotlib.rc_context({"svg.hashsalt": "report-kit", "svg.fonttype": "path"}):
        fig.savefig(png, dpi=150, bbox_inches="tight", metadata={"Software": None})
        fig.savefig(figures / f"{name}.svg", bbox_inches="tight", metadata={"Date": None, "Creator": None})
    data = base64.b64encode(png.read_bytes()).decode("ascii")
    alt = html.escape(caption or name.replace("_", " "), quote=True)
    cap = f'<figcaption class="rk-caption">{html.escape(caption)}</figcaption>' if caption else ""
    display(HTML(f'<figure class="rk-figure"><img src="data:image/png;base64,{data}" alt="{alt}">{cap}</figure>'))


def say(text: str) -> None:
    """Display a paragraph of Markdown written by the template; pass user text through :func:`esc`."""
    from IPython.display import Markdown, display

    display(Markdown(text))


def callout(text: str, kind: str = "info") -> None:
    """Display a boxed HTML paragraph (kind: info | caution | change); pass user text through :func:`esc`."""
    from IPython.display import HTML, display

    display(HTML(f'<div class="rk-box rk-{kind}">{text}</div>'))


def show_opening(view: RunView) -> None:
    """Open a report: the study summary (escaped), then the standing cautions with the plan-lock status."""
    from report_kit.report.headline import registration_line

    if view.spec.summary:
        say(esc(view.spec.summary.strip()))
    if registration_line(view.spec):
        callout(registration_line(view.spec), "info")
    callout("<b>Read this first.</b><ul>" + "".join(f"<li>{c}</li>" for c in cautions(view.plan)) + "</ul>",
            "caution")


ASSIGNMENT_CHECK_WORDS = {
    "reproduced": "re-drawn from the recorded seed: identical",
    "mismatch": "re-drawn from the recorded seed: DIFFERENT (see check output)",
    "not_checked": "not checked (no assignment seed recorded)",
}


def show_outcomes(view: RunView) -> None:
    """The table of pre-specified outcomes (label, column, family, alternative, statistic)."""
    outs = pd.DataFrame(
        [(o.label, o.column, o.family, o.alternative, o.statistic.replace("_", " ")) for o in view.spec.outcomes],
        columns=["Outcome", "Column", "Family", "Alternative", "Test statistic"],
    )
    show_table(view, outs, "outcomes", caption="Pre-specified outcomes")

"""The power plan of a project folder: power and MDE of its design as planned.

Owns :func:`plan_power` (behind ``report-kit power``), its result
:class:`PowerPlan` and the text summary :func:`format_plan_text`: the planned
units (from the units table, or from planned sizes), the analytic power of
the design and the simulation of the planned experiment under its own
mechanism and randomization test. Built on :mod:`report_kit.planning.core`;
also importable from :mod:`report_kit.planning.power`.
"""

from __future__ import annotations

import difflib
import warnings
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from report_kit.validate import Record, closed_unit_interval, finite_number, open_unit_interval
from report_kit.planning.core import (
    _check_positive,
    _check_progress,
    _count_rejections,
    _simulation_summary,
    planned_power,
)
from report_kit.design.draw import draw_assignment
from report_kit.design.mechanism import mechanism_from_arrays
from report_kit.errors import ReportKitWarning
from report_kit.planning.units import _CLUSTERED, _PlanOptions, _PlannedUnits, _codes, _planned_units
from report_kit.inputs.model import OutcomeSpec, Spec
from report_kit.inference.randomization import randomization_test
from report_kit.inputs.spec import load_spec

__all__ = ["DEFAULT_TEST_DRAWS", "SIM_EXACT_LIMIT", "PowerPlan", "format_plan_text", "plan_power"]


# ---------------------------------------------------------------------------
# the design as planned, from a project folder
# ---------------------------------------------------------------------------

#: Randomization draws per simulated experiment: alpha * (B + 1) is whole at
#: alpha = 0.05 and 0.01 (common practice).
DEFAULT_TEST_DRAWS = 499
#: Simulated tests enumerate every assignment up to this many (and ``analysis.max_exact``):
#: cheaper than random draws for small designs, and what the analysis itself does.
SIM_EXACT_LIMIT = 10_000


@dataclass(frozen=True, kw_only=True)
class PowerPlan(Record):
    """Power and minimum detectable effect of a project's design as planned.

    Attributes
    ----------
    project, title : str
        The project folder and the spec's title.
    mechanism : str
        ``design.mechanism``.
    sizes_from : {"assignment", "data", "options"}
        Where the sizes came from: the actual arms of an assigned units table,
        the units table (expected arm sizes), or the planned sizes given.
    units_table : str or None
        ``data.units`` when the sizes come from it.
    n_units : int
    n_blocks, n_clusters, clusters_treated : int or None
        ``None`` when the design has no blocks (clusters).
    outcome, statistic : str
        The outcome whose pre-specified test (statistic, alternative) is planned for.
    analytic : dict
        :func:`planned_power` for the design (expected arm sizes, mean cluster size).
    simulation : dict or None
        :func:`simulated_power`-style summary of the simulation, with
        ``seed``, ``draws``, ``test_method``, ``statistic``, ``alternative``,
        ``effect_from`` and ``undefined``; ``None`` when not simulated.
    """

    project: str
    title: str
    mechanism: str
    sizes_from: str
    units_table: str | None
    n_units: int
    n_blocks: int | None
    n_clusters: int | None
    clusters_treated: int | None
    outcome: str
    statistic: str
    analytic: dict
    simulation: dict | None = None

    @property
    def design(self) -> dict:
        """The design as planned (sizes, clusters, design effect), as ``results`` of ``report-kit power`` show it."""
        a = self.analytic
        return {
            "mechanism": self.mechanism, "sizes_from": self.sizes_from, "units_table": self.units_table,
            "n_units": self.n_units, "n_treated": a["n_treated"], "n_control": a["n_control"],
            "n_blocks": self.n_blocks, "n_clusters": self.n_clusters,
            "clusters_treated": self.clusters_treated,
            "clusters_control": None if self.n_clusters is None else self.n_clusters - self.clusters_treated,
            "cluster_size": a["cluster_size"], "icc": a["icc"], "design_effect": a["design_effect"],
        }

    record_keys = ("project", "title", "outcome", "statistic", "design", "analytic", "simulation")


def plan_power(project: Path | str | Spec, *, sd: float | None = None, effect: float | None = None,
               power: float = 0.8, icc: float | None = None, cluster_size: float | None = None,
               n_treated: int | None = None, n_control: int | None = None, n_clusters: int | None = None,
               outcome: str | None = None, simulate: int = 0, draws: int = DEFAULT_TEST_DRAWS,
               seed: int | None = None, progress: Callable[[int, int], None] | None = None,
               attrition: float = 0.0, takeup_treated: float | None = None,
               takeup_control: float | None = None) -> PowerPlan:
    r"""Power and MDE of a project's design as planned, before (or without) outcome data.

    Parameters
    ----------
    project : path or Spec
        A project folder (or its ``design.yaml``), or a loaded spec.
    sd : float
        Outcome standard deviation :math:`\sigma` (required).
    effect : float, optional
        Effect for the power; the MDE at ``power`` is always given.
    power : float, default 0.8
        Target power of the MDE.
    icc : float
        Intraclass correlation :math:`\rho`; required for cluster designs,
        not accepted for the others.
    cluster_size, n_treated, n_control, n_clusters : optional
        The planned sizes, used only while the units table named by
        ``data.units`` does not exist (it gives them otherwise). Cluster
        designs need ``cluster_size`` :math:`m` and either ``n_clusters``
        (split by ``design.probability``, default 0.5) or ``n_treated`` and
        ``n_control`` in units; other designs need ``n_treated`` and
        ``n_control``.
    outcome : str, optional
        Outcome whose pre-specified test is planned for (default: the first
        primary outcome); sets the alternative and the simulated statistic.
    simulate : int, default 0
        Number of simulated experiments (0: analytic only).
    draws : int, default 499
        Randomization draws of the test in each simulated experiment; every
        assignment is used instead when there are at most
        ``max(draws, SIM_EXACT_LIMIT)`` (10 000) and at most
        ``analysis.max_exact``.
    seed : int, optional
        Seed of the simulation (default ``analysis.seed``).
    progress : callable ``(done, total)``, optional
        Called after each simulated experiment.
    attrition, takeup_treated, takeup_control : float, optional
        Expected share of missing outcomes and expected take-up by arm, passed
        to :func:`planned_power` (the analytic MDE of the ITT with the analysed
        units, and ``mde_cace``).

    Returns
    -------
    PowerPlan

    Notes
    -----
    With a units table whose treatment column (``design.treatment``) is
    already filled with 0/1 for every unit, the arm sizes are the actual ones
    (``sizes_from = "assignment"``). Otherwise, with a units table, the sizes are those of the real design: the number
    of randomization units (units or clusters) treated in each stratum is
    :func:`~report_kit.design.mechanism.number_treated` of ``design.probability``
    (0.5 when absent, as ``report-kit assign`` draws it), and the expected
    number of treated units is :math:`\sum_s (k_s/G_s)\,n_s` over strata
    :math:`s` with :math:`G_s` randomization units, :math:`k_s` of them
    treated, and :math:`n_s` units (:math:`np` for ``bernoulli``). The mean
    cluster size is :math:`m = n/J` for :math:`J` clusters.

    The analytic part is :func:`planned_power` with the design effect
    :math:`1 + (m - 1)\rho` (Kish 1965; Donner & Klar 2000) and the
    spec's ``alpha`` and the outcome's ``alternative``. Blocks and pairs are
    left out of the analytic formula (no block effects are assumed), which
    is conservative when blocks explain outcome variance.

    The simulation (Arnold et al. 2011) repeats, for experiment :math:`i`
    with generator ``default_rng`` of the :math:`i`-th child of
    ``SeedSequence(seed)``: control outcomes
    :math:`y_{0i} = u_{c(i)} + e_i` with :math:`u_c \sim N(0, \rho\sigma^2)`
    per cluster and :math:`e_i \sim N(0, (1-\rho)\sigma^2)` (so the total
    variance is :math:`\sigma^2` and the intraclass correlation
    :math:`\rho`, as in the analytic formula); an assignment :math:`z` drawn
    by :func:`~report_kit.design.draw.draw_assignment` with a fresh seed;
    :math:`y = y_0 + \tau z`; and the outcome's randomization test
    (:func:`~report_kit.inference.randomization.randomization_test`) over ``draws``
    random assignments of the same mechanism (or all of them, see
    ``draws``), conditioned on the drawn numbers treated. Power is the share of :math:`p \le \alpha`. Without
    ``effect`` the simulation uses the analytic MDE, so its power can be read
    against the target. A simulated experiment whose statistic is undefined,
    or a Bernoulli draw with an empty arm, counts as not rejecting.
    """
    spec = project if isinstance(project, Spec) else load_spec(project)
    opts = _check_plan(spec, sd=sd, effect=effect, power=power, icc=icc, cluster_size=cluster_size,
                       n_treated=n_treated, n_control=n_control, n_clusters=n_clusters,
                       simulate=simulate, draws=draws, seed=seed)
    progress = _check_progress(progress)
    target = _target_outcome(spec, outcome)
    units = _planned_units(spec, opts)
    if opts.simulate and units.ids is None:
        raise ValueError(f"cannot simulate: {units.why_not}")
    analytic = planned_power(n_treated=units.n_treated, n_control=units.n_control, sd=opts.sd,
                             effect=opts.effect, power=opts.power, icc=opts.icc,
                             cluster_size=units.cluster_size, alpha=spec.analysis.alpha,
                             alternative=target.alternative, attrition=attrition,
                             takeup_treated=takeup_treated, takeup_control=takeup_control)
    simulation = None
    if opts.simulate:
        simulation = _simulate_plan(units, target, analytic, opts, alpha=spec.analysis.alpha,
                                    max_exact=spec.analysis.max_exact,
                                    seed=spec.analysis.seed if opts.seed is None else opts.seed,
                                    progress=progress)
    return PowerPlan(
        project=str(spec.project_dir), title=spec.title, mechanism=units.mechanism,
        sizes_from=units.sizes_from, units_table=units.units_table, n_units=units.n_units,
        n_blocks=units.n_blocks, n_clusters=units.n_clusters, clusters_treated=units.clusters_treated,
        outcome=target.column, statistic=target.statistic, analytic=analytic, simulation=simulation,
    )


# ----------------------------------------------------------------- validation of the plan


def _check_count(name: str, value) -> int | None:
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
        raise ValueError(f"`{name}` must be a whole number >= 1; got {value!r}")
    return int(value)


def _check_plan(spec: Spec, *, sd, effect, power, icc, cluster_size, n_treated, n_control, n_clusters,
                simulate, draws, seed) -> _PlanOptions:
    kind = spec.design.mechanism
    clustered = kind in _CLUSTERED
    if sd is None:
        raise ValueError("`sd` is required: the standard deviation of the outcome in its own units "
                         "(e.g. from a pilot or an earlier study)")
    sd = _check_positive("sd", sd)
    if effect is not None:
        effect = finite_number("effect", effect)
    power = open_unit_interval("power", power)
    if clustered and icc is None:
        raise ValueError(f"`icc` is required for a {kind} design: the intraclass correlation of the outcome "
                         "within clusters, a number in [0, 1]")
    if not clustered and icc not in (None, 0):
        raise ValueError(f"`icc` applies to cluster designs only; design.mechanism is {kind!r}")
    icc = 0.0 if icc is None else closed_unit_interval("icc", icc)
    for name, value in (("cluster_size", cluster_size), ("n_clusters", n_clusters)):
        if value is not None and not clustered:
            raise ValueError(f"`{name}` applies to cluster designs only; design.mechanism is {kind!r}")
    cluster_size = _check_positive("cluster_size", cluster_size, allow_none=True)
    if cluster_size is not None and cluster_size < 1:
        raise ValueError(f"`cluster_size` must be at least 1; got {cluster_size!r}")
    n_treated, n_control = _check_count("n_treated", n_treated), _check_count("n_control", n_control)
    n_clusters = _check_count("n_clusters", n_clusters)
    if (n_treated is None) != (n_control is None):
        raise ValueError("`n_treated` and `n_control` go together: give both planned arm sizes")
    if n_clusters is not None and n_treated is not None:
        raise ValueError("give either `n_clusters` or `n_treated` and `n_control`, not both")
    if isinstance(simulate, bool) or not isinstance(simulate, (int, np.integer)) or simulate < 0:
        raise ValueError(f"`simulate` must be a whole number >= 0; got {simulate!r}")
    draws = _check_count("draws", draws)
    if seed is not None and (isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0):
        raise ValueError(f"`seed` must be a non-negative integer; got {seed!r}")
    return _PlanOptions(sd=sd, effect=effect, power=power, icc=icc, cluster_size=cluster_size,
                        n_treated=n_treated, n_control=n_control, n_clusters=n_clusters,
                        simulate=int(simulate), draws=draws, seed=None if seed is None else int(seed))


def _target_outcome(spec: Spec, outcome: str | None) -> OutcomeSpec:
    if outcome is None:
        primary = [o for o in spec.outcomes if o.family == "primary"]
        return (primary or list(spec.outcomes))[0]
    names = [o.column for o in spec.outcomes]
    if outcome not in names:
        close = difflib.get_close_matches(str(outcome), names, n=1)
        hint = f" — did you mean {close[0]!r}?" if close else ""
        raise ValueError(f"`outcome` must be one of the spec's outcomes {names}; got {outcome!r}{hint}")
    return spec.outcomes[names.index(outcome)]


# ----------------------------------------------------------------- simulation of the plan


def _simulate_plan(units: _PlannedUnits, target: OutcomeSpec, analytic: Mapping, opts: _PlanOptions, *,
                   alpha: float, max_exact: int, seed: int, progress: Callable | None) -> dict:
    """Simulated power of the planned design under its own mechanism and randomization test."""
    if opts.effect is not None:
        effect, effect_from = opts.effect, "effect"
    else:
        effect = -analytic["mde"] if target.alternative == "less" else analytic["mde"]
        effect_from = "mde"
    run = _PlanRun(units, target, sd=opts.sd, icc=opts.icc, effect=effect, draws=opts.draws,
                   max_exact=min(max(opts.draws, SIM_EXACT_LIMIT), max_exact))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ReportKitWarning)  # undefined statistics are counted instead
        rejections = _count_rejections(run, n_sims=opts.simulate, alpha=alpha, seed=seed, progress=progress)
    if run.undefined:
        warnings.warn(f"the {target.statistic} statistic was undefined in {run.undefined} of {opts.simulate} "
                      "simulated experiments; they count as not rejecting", ReportKitWarning, stacklevel=3)
    summary = _simulation_summary(effect, alpha, opts.simulate, rejections)
    methods = sorted(run.methods)
    summary.update(seed=seed, draws=opts.draws, test_method=methods[0] if len(methods) == 1 else "mixed",
                   statistic=target.statistic, alternative=target.alternative, effect_from=effect_from,
                   undefined=run.undefined)
    return summary


class _PlanRun:
    """One simulated experiment of a planned design: ``rng -> p-value`` (see :func:`plan_power`)."""

    def __init__(self, units: _PlannedUnits, target: OutcomeSpec, *, sd: float, icc: float, effect: float,
                 draws: int, max_exact: int):
        self.units, self.target, self.effect, self.draws, self.max_exact = units, target, effect, draws, max_exact
        self.within, self.between = sd * np.sqrt(1 - icc), sd * np.sqrt(icc)
        self.ccodes = None if units.cluster is None else _codes(units.cluster)
        self.undefined = 0
        self.methods: set[str] = set()

    def __call__(self, rng: np.random.Generator) -> float:
        u = self.units
        y0 = rng.normal(0.0, self.within, size=u.n_units)
        if self.ccodes is not None:
            y0 = y0 + rng.normal(0.0, self.between, size=int(self.ccodes.max()) + 1)[self.ccodes]
        z = draw_assignment(u.mechanism, u.ids, seed=int(rng.integers(2**63)), block=u.block, cluster=u.cluster,
                            probability=u.probability)
        test_seed = int(rng.integers(2**63))
        if u.mechanism == "bernoulli" and z.sum() in (0, z.size):
            self.undefined += 1
            return 1.0
        mechanism = mechanism_from_arrays(u.mechanism, z, block=u.block, cluster=u.cluster,
                                          probability=u.probability if u.mechanism == "bernoulli" else None)
        source = mechanism.assignments(max_exact=self.max_exact, draws=self.draws, seed=test_seed)
        self.methods.add(source.method)
        (result,) = randomization_test(y0 + self.effect * z, mechanism, source=source,
                                       statistic=self.target.statistic, alternative=self.target.alternative)
        if result.p_value is None:
            self.undefined += 1
            return 1.0
        return result.p_value


# ----------------------------------------------------------------- text summary


def _g(x, digits: int = 4) -> str:
    return "—" if x is None else f"{x:.{digits}g}"


def format_plan_text(plan: PowerPlan) -> str:
    """A readable summary of a :class:`PowerPlan` (what ``report-kit power`` prints)."""
    a, sim = plan.analytic, plan.simulation
    source = {"data": f"sizes from {plan.units_table}",
              "assignment": f"actual arm sizes from {plan.units_table}"}.get(
        plan.sizes_from, "planned sizes (no units table yet)")
    expected = plan.mechanism == "bernoulli" or (plan.mechanism in _CLUSTERED and plan.sizes_from == "data")
    lines = [f"Power plan: {plan.title}",
             f"  design         {plan.mechanism}; {source}",
             f"  units          {_g(plan.n_units, 8)}: {_g(a['n_treated'], 8)} treated, "
             f"{_g(a['n_control'], 8)} control" + (" (expected)" if expected else "")]
    if plan.n_blocks is not None:
        lines.append(f"  {'pairs' if plan.mechanism == 'matched_pairs' else 'blocks':<14} {plan.n_blocks} "
                     "(the formula ignores them: when pairing or blocking predicts the outcome, give the SD "
                     "within pairs/blocks as --sd, or the MDE is conservative)")
    if plan.mechanism in _CLUSTERED:
        counts = ("" if plan.clusters_treated is None
                  else f" ({plan.clusters_treated} treated, {plan.n_clusters - plan.clusters_treated} control)")
        lines.append(f"  clusters       {_g(plan.n_clusters, 8)}{counts}, {_g(a['cluster_size'])} units on average")
        lines.append(f"  design effect  {_g(a['design_effect'])} = 1 + ({_g(a['cluster_size'])} - 1) x {_g(a['icc'])} "
                     "(ICC)")
    lines += [f"  test           {plan.outcome}: alpha {_g(a['alpha'])}, {a['alternative']}",
              f"  outcome SD     {_g(a['sd'])}",
              f"  std. error     {_g(a['std_error'])} (t test, {_g(a['df'], 8)} df)",
              f"  MDE            {_g(a['mde'])} at {a['target_power']:.0%} power ({_g(a['mde_std'], 3)} SD)"]
    if a.get("attrition"):
        lines.insert(-1, f"  attrition      {a['attrition']:.0%} expected: {_g(a['n_treated_analysed'], 8)} treated and "
                         f"{_g(a['n_control_analysed'], 8)} control units analysed")
    if a.get("mde_cace") is not None:
        lines.append(f"  MDE (CACE)     {_g(a['mde_cace'])} = MDE / ({_g(a['takeup_treated'])} - "
                     f"{_g(a['takeup_control'])}) take-up difference")
    if a["power"] is not None:
        lines.append(f"  power          {a['power']:.3f} at effect {_g(a['effect'])} (analytic)")
    if sim is not None:
        at = "the MDE" if sim["effect_from"] == "mde" else "effect"
        test = "exact" if sim["test_method"] == "exact" else f"{sim['draws']} draws"
        lines.append(f"  simulated      {sim['power']:.3f} (Monte Carlo SE {sim['mc_std_error']:.3f}) at {at} "
                     f"{_g(sim['effect'])}")
        lines.append(f"                 {sim['n_sims']} experiments drawn by the design's mechanism, each with its "
                     f"randomization test ({sim['statistic']}, {test}); seed {sim['seed']}")
    return "\n".join(lines)

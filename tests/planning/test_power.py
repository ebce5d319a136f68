"""Tests of report_kit.planning.power."""

from __future__ import annotations

import json
import shutil
import statistics
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import yaml
from click.testing import CliRunner
from statsmodels.stats.power import NormalIndPower, TTestIndPower

from report_kit.planning import power as pw
from report_kit.cli import main
from report_kit.inputs.model import AnalysisSpec, DataSpec, DesignSpec, OutcomeSpec, Spec, Study

from tests.conftest import copy_project

# ---------------------------------------------------------------------------
# MDE from a standard error
# ---------------------------------------------------------------------------


@pytest.mark.parametrize(("n1", "n0", "alpha", "target"), [(50, 50, 0.05, 0.8), (120, 60, 0.05, 0.9),
                                                          (400, 400, 0.01, 0.8)])
def test_mde_normal_matches_statsmodels_normal_power(n1, n0, alpha, target):
    # Reference: statsmodels.stats.power.NormalIndPower.solve_power (effect in SD
    # units; SE of the standardized difference is sqrt(1/n1 + 1/n0)). statsmodels
    # counts the far tail too, which the MDE formula neglects: tolerance 1e-4.
    expected = NormalIndPower().solve_power(nobs1=n1, ratio=n0 / n1, alpha=alpha, power=target)
    got = pw.mde(np.sqrt(1 / n1 + 1 / n0), alpha=alpha, power=target)
    assert got == pytest.approx(expected, rel=1e-4)


def test_mde_multiplier_is_about_2_8():
    # Bloom (1995): at alpha = 0.05 two-sided and 80% power the MDE is about
    # 2.8 standard errors (value from memory).
    assert pw.mde(1.0) == pytest.approx(2.8, abs=0.005)
    # one-sided uses z_{0.95} + z_{0.8} = 1.645 + 0.842 (from memory)
    assert pw.mde(1.0, alternative="greater") == pytest.approx(2.486, abs=0.001)
    assert pw.mde(2.0, df=10) > pw.mde(2.0)


def test_mde_validation_messages():
    with pytest.raises(ValueError, match=r"`se` must be a positive number; got -1"):
        pw.mde(-1)
    with pytest.raises(ValueError, match=r"`alpha` must be a number strictly between 0 and 1; got 1.5"):
        pw.mde(1, alpha=1.5)
    with pytest.raises(ValueError, match=r"`alternative` must be one of \{'two-sided', 'greater', 'less'\}; got 'both'"):
        pw.mde(1, alternative="both")


# ---------------------------------------------------------------------------
# analytic power of a planned design
# ---------------------------------------------------------------------------

SM_ALTERNATIVE = {"two-sided": "two-sided", "greater": "larger", "less": "smaller"}


@pytest.mark.parametrize(("n1", "n0", "d", "alternative"), [
    (50, 50, 0.5, "two-sided"), (30, 70, 0.3, "two-sided"), (20, 20, 0.8, "greater"),
    (40, 25, -0.6, "less"), (200, 100, 0.1, "two-sided"),
])
def test_planned_power_matches_statsmodels_ttest(n1, n0, d, alternative):
    # Reference: statsmodels.stats.power.TTestIndPower.power (noncentral t,
    # df = n1 + n0 - 2, both tails for two-sided).
    expected = TTestIndPower().power(effect_size=d, nobs1=n1, alpha=0.05, ratio=n0 / n1,
                                     alternative=SM_ALTERNATIVE[alternative])
    got = pw.planned_power(n_treated=n1, n_control=n0, sd=2.0, effect=2.0 * d, alternative=alternative)
    assert got["power"] == pytest.approx(expected, rel=1e-9)


@pytest.mark.parametrize(("n1", "n0", "target"), [(50, 50, 0.8), (30, 70, 0.9), (15, 15, 0.5)])
def test_planned_mde_matches_statsmodels_solve_power(n1, n0, target):
    # Reference: statsmodels TTestIndPower. Its solve_power stops at a loose
    # tolerance (agreement to 1e-5); its power at our MDE must hit the target
    # to 1e-9.
    expected = TTestIndPower().solve_power(nobs1=n1, ratio=n0 / n1, alpha=0.05, power=target)
    got = pw.planned_power(n_treated=n1, n_control=n0, sd=3.0, power=target)
    assert got["mde"] == pytest.approx(3.0 * expected, rel=1e-5)
    assert got["mde_std"] == pytest.approx(expected, rel=1e-5)
    at_mde = TTestIndPower().power(effect_size=got["mde_std"], nobs1=n1, ratio=n0 / n1, alpha=0.05)
    assert at_mde == pytest.approx(target, abs=1e-9)
    assert got["power"] is None


def test_cluster_design_uses_design_effect():
    # Design effect 1 + (m - 1) rho (Kish 1965; Donner & Klar 2000).
    base = pw.planned_power(n_treated=400, n_control=400, effect=0.2)
    clus = pw.planned_power(n_treated=400, n_control=400, effect=0.2, icc=0.05, cluster_size=20)
    assert clus["design_effect"] == pytest.approx(1 + 19 * 0.05)
    assert clus["std_error"] / base["std_error"] == pytest.approx(np.sqrt(1.95))
    assert clus["df"] == 38 and clus["power"] < base["power"]
    # With rho = 1 every cluster acts as one unit: the design is a t test on
    # 20 + 20 cluster means (reference: statsmodels TTestIndPower).
    whole = pw.planned_power(n_treated=400, n_control=400, effect=0.5, icc=1.0, cluster_size=20)
    expected = TTestIndPower().power(effect_size=0.5, nobs1=20, ratio=1.0, alpha=0.05)
    assert whole["power"] == pytest.approx(expected, rel=1e-9)


def test_planned_power_validation_messages():
    with pytest.raises(ValueError, match=r"`icc` must be in \[0, 1\]; got 1.5"):
        pw.planned_power(n_treated=10, n_control=10, icc=1.5)
    with pytest.raises(ValueError, match="more than two clusters"):
        pw.planned_power(n_treated=10, n_control=10, cluster_size=10)
    with pytest.raises(ValueError, match=r"`n_treated` must be a positive number"):
        pw.planned_power(n_treated=0, n_control=10)
    json.dumps(pw.planned_power(n_treated=10, n_control=12, effect=1.0), allow_nan=False)


# ---------------------------------------------------------------------------
# simulated power
# ---------------------------------------------------------------------------


def randomization_test(draws: int, seed: int):
    """A Monte Carlo Fisher test of |mean difference| written for this test file."""
    rng = np.random.default_rng(seed)

    def test(y, z):
        n1 = z.sum()
        perms = rng.permuted(np.tile(z, (draws, 1)), axis=1)
        null = np.abs(perms @ y / n1 - (1 - perms) @ y / (z.size - n1))
        obs = abs(y[z == 1].mean() - y[z == 0].mean())
        return (1 + np.sum(null >= obs - 1e-12)) / (draws + 1)
    return test


def test_simulated_power_is_near_analytic_on_large_complete_design():
    # Reference: statsmodels TTestIndPower.power for the same design; the
    # randomization test is asymptotically as powerful as the t test
    # (Lehmann & Romano 2005, ch. 15, from memory). Tolerance: 4 simulation SEs.
    n, n1, effect = 200, 100, 0.4
    z_fixed = np.array([1] * n1 + [0] * (n - n1))
    res = pw.simulated_power(
        lambda rng: rng.normal(size=n), effect,
        lambda rng: rng.permutation(z_fixed), randomization_test(399, 7),
        n_sims=800, seed=123,
    )
    expected = TTestIndPower().power(effect_size=effect, nobs1=n1, ratio=1.0, alpha=0.05)
    assert abs(res["power"] - expected) < 4 * np.sqrt(expected * (1 - expected) / 800)
    assert res["rejections"] == round(res["power"] * 800)
    json.dumps(res, allow_nan=False)


def test_simulated_power_is_reproducible_and_validates():
    y0 = np.random.default_rng(0).normal(size=30)
    z_fixed = np.array([1] * 15 + [0] * 15)
    args = (y0, 0.5, lambda rng: rng.permutation(z_fixed))
    a = pw.simulated_power(*args, randomization_test(99, 1), n_sims=40, seed=5)
    b = pw.simulated_power(*args, randomization_test(99, 1), n_sims=40, seed=5)
    assert a == b
    with pytest.raises(ValueError, match=r"`test` must return a p-value in \[0, 1\]; got 2.0"):
        pw.simulated_power(*args, lambda y, z: 2.0, n_sims=3, seed=5)
    with pytest.raises(ValueError, match=r"`n_sims` must be a positive integer; got 0"):
        pw.simulated_power(*args, lambda y, z: 0.5, n_sims=0, seed=5)
    with pytest.raises(ValueError, match=r"`draw_assignment` returned shape \(3,\)"):
        pw.simulated_power(y0, 0.5, lambda rng: np.zeros(3), lambda y, z: 0.5, n_sims=3, seed=5)
    # a test that always rejects gives power 1 with zero Monte Carlo error
    one = pw.simulated_power(*args, lambda y, z: 0.0, n_sims=10, seed=5)
    assert one["power"] == 1.0 and one["mc_std_error"] == 0.0


# ---------------------------------------------------------------------------
# study as run
# ---------------------------------------------------------------------------


def make_study() -> Study:
    frame = pd.DataFrame({
        "uid": range(8),
        "z": [1, 1, 1, 1, 0, 0, 0, 0],
        "y": [3.0, 4.0, 5.0, 6.0, 1.0, 2.0, 4.0, np.nan],
        "w": [1.0, 0.0, 1.0, 1.0, 0.0, 0.0, 1.0, 0.0],
    })
    spec = Spec(
        path=Path("/nonexistent/design.yaml"), spec_version=1, title="Invented study", summary="",
        data=DataSpec(units="data/units.csv", id="uid"),
        design=DesignSpec(mechanism="complete", treatment="z"),
        analysis=AnalysisSpec(alpha=0.1),
        outcomes=(OutcomeSpec(column="y", label="Y"), OutcomeSpec(column="w", label="W", family="secondary")),
    )
    return Study(spec=spec, frame=frame, inputs=())


def test_study_power_as_run():
    study = make_study()
    estimates = [
        {"outcome": "y", "estimand": "ATE", "estimator": "adjusted", "subgroup": None, "std_error": 0.5, "df": 4.0},
        {"outcome": "y", "estimand": "ATE", "estimator": "unadjusted", "subgroup": None, "std_error": 1.2, "df": 5.0},
    ]
    section = pw.study_power(study, estimates, planned=[pw.planned_power(n_treated=4, n_control=4)])
    json.dumps(section, allow_nan=False)
    assert section["alpha"] == 0.1 and section["target_power"] == 0.8
    y_row, w_row = section["as_run"]
    assert y_row["std_error"] == 1.2 and y_row["mde"] == pytest.approx(pw.mde(1.2, 0.1, 0.8, 5.0))
    assert y_row["sd_control"] == pytest.approx(statistics.stdev([1.0, 2.0, 4.0]))
    assert y_row["mde_std"] == pytest.approx(y_row["mde"] / y_row["sd_control"])
    assert w_row["mde"] is None and w_row["std_error"] is None
    assert section["planned"][0]["method"] == "analytic"


# ---------------------------------------------------------------------------
# the design as planned: plan_power and `report-kit power`
# ---------------------------------------------------------------------------


def power_cli(*args):
    return CliRunner().invoke(main, ["power", *(str(a) for a in args)])


def without_data(project: Path) -> Path:
    """The project as before its data exist (copies only; projects/ is never written)."""
    shutil.rmtree(project / "data")
    return project


def edit_design(project: Path, change) -> Path:
    path = project / "design.yaml"
    doc = yaml.safe_load(path.read_text())
    change(doc["design"])
    path.write_text(yaml.safe_dump(doc, sort_keys=False))
    return project


def as_cluster_design(project: Path) -> Path:
    """tutoring-clubs turned into a plain cluster design without data."""
    def change(design):
        design["mechanism"] = "cluster"
        del design["block"]
    return without_data(edit_design(project, change))


def test_cli_power_quiet_hours_matches_statsmodels(tmp_path):
    project = copy_project("quiet-hours", tmp_path)
    units = pd.read_csv(project / "data" / "branches.csv")
    result = power_cli(project, "--sd", 50, "--effect", 60, "--json")
    assert result.exit_code == 0, result.output
    plan = json.loads(result.stdout)
    # complete randomization of the 12 branches, half treated (design.probability absent -> 0.5)
    assert plan["design"]["n_units"] == len(units) == 12
    assert (plan["design"]["n_treated"], plan["design"]["n_control"]) == (6, 6)
    assert plan["design"]["sizes_from"] == "assignment" and plan["design"]["design_effect"] == 1.0
    # Reference: statsmodels.stats.power.TTestIndPower (noncentral t, df = 10).
    ref = TTestIndPower()
    assert plan["analytic"]["power"] == pytest.approx(ref.power(effect_size=60 / 50, nobs1=6, ratio=1.0,
                                                                alpha=0.05), rel=1e-9)
    d80 = ref.solve_power(nobs1=6, ratio=1.0, alpha=0.05, power=0.8)
    assert plan["analytic"]["mde"] == pytest.approx(50 * d80, rel=1e-5)
    assert plan["simulation"] is None and plan["outcome"] == "visits_after"
    text = power_cli(project, "--sd", 50, "--effect", 60)
    assert text.exit_code == 0
    assert "12: 6 treated, 6 control" in text.stdout and "MDE            " in text.stdout
    assert f"{plan['analytic']['power']:.3f} at effect 60" in text.stdout


def test_cli_power_tutoring_clubs_design_effect_by_hand(tmp_path):
    project = copy_project("tutoring-clubs", tmp_path)
    pupils = pd.read_csv(project / "data" / "pupils.csv")
    # before the assignment: the treatment column is not in the units table yet
    pupils.drop(columns="assigned").to_csv(project / "data" / "pupils.csv", index=False)
    n, clusters = len(pupils), pupils["school"].nunique()
    m, rho, sd, effect = n / clusters, 0.05, 10.0, 3.0
    result = power_cli(project, "--sd", sd, "--icc", rho, "--effect", effect, "--json")
    assert result.exit_code == 0, result.output
    plan = json.loads(result.stdout)
    deff = 1 + (m - 1) * rho  # design effect computed by hand (Kish 1965)
    assert plan["design"]["design_effect"] == pytest.approx(deff, rel=1e-12)
    assert plan["design"]["cluster_size"] == pytest.approx(m)
    assert (plan["design"]["n_clusters"], plan["design"]["clusters_treated"]) == (clusters, clusters // 2)
    assert plan["design"]["n_blocks"] == pupils["district"].nunique()
    # three of six schools per district: half the pupils are expected to be treated
    assert plan["analytic"]["n_treated"] == plan["analytic"]["n_control"] == n / 2
    assert plan["analytic"]["std_error"] == pytest.approx(sd * np.sqrt(deff * (2 / n + 2 / n)), rel=1e-12)
    assert plan["analytic"]["df"] == clusters - 2
    # Reference: statsmodels TTestIndPower on the cluster means, whose SD is
    # sd * sqrt(deff / m) (Donner & Klar 2000, ch. 2), with J/2 clusters per arm.
    expected = TTestIndPower().power(effect_size=effect / (sd * np.sqrt(deff / m)), nobs1=clusters // 2,
                                     ratio=1.0, alpha=0.05)
    assert plan["analytic"]["power"] == pytest.approx(expected, rel=1e-9)
    text = power_cli(project, "--sd", sd, "--icc", rho).stdout
    assert f"clusters       {clusters} ({clusters // 2} treated, {clusters // 2} control)" in text
    assert "design effect  " in text and "blocks         4" in text


def test_cli_power_uses_actual_arm_sizes_once_assigned(tmp_path):
    # Reference: statsmodels TTestIndPower with the arm sizes counted here from the units
    # table's filled treatment column (the actual arms, not the expected ones).
    project = copy_project("quiet-hours", tmp_path)
    spec = yaml.safe_load((project / "design.yaml").read_text())
    units = pd.read_csv(project / spec["data"]["units"])
    units.loc[units.index[:2], spec["design"]["treatment"]] = 1     # unequal arms on purpose
    units.to_csv(project / spec["data"]["units"], index=False)
    z = units[spec["design"]["treatment"]]
    n1, n0 = int(z.sum()), int((1 - z).sum())
    assert n1 != n0
    plan = json.loads(power_cli(project, "--sd", 2.0, "--effect", 1.5, "--json").stdout)
    assert plan["design"]["sizes_from"] == "assignment"
    assert (plan["design"]["n_treated"], plan["design"]["n_control"]) == (n1, n0)
    expected = TTestIndPower().power(effect_size=1.5 / 2.0, nobs1=n1, ratio=n0 / n1, alpha=0.05)
    assert plan["analytic"]["power"] == pytest.approx(expected, rel=1e-9)


@pytest.mark.parametrize("attrition", [0.0, 0.1, 0.3])
def test_planned_mde_with_attrition_matches_statsmodels_on_analysed_units(attrition):
    # statsmodels TTestIndPower.solve_power on the units left after attrition
    # (n_a (1 - attrition) per arm): same noncentral t (Cohen 1988), same df.
    n1, n0 = 120, 80
    # solve_power stops at a loose tolerance (1e-5); statsmodels' power at our MDE must
    # hit the target to 1e-9.
    res = pw.planned_power(n_treated=n1, n_control=n0, sd=1.0, power=0.8, attrition=attrition)
    ref = TTestIndPower().solve_power(effect_size=None, nobs1=n1 * (1 - attrition),
                                      ratio=n0 / n1, alpha=0.05, power=0.8)
    assert res["mde"] == pytest.approx(ref, rel=1e-5)
    at_mde = TTestIndPower().power(effect_size=res["mde"], nobs1=n1 * (1 - attrition), ratio=n0 / n1,
                                   alpha=0.05)
    assert at_mde == pytest.approx(0.8, abs=1e-9)
    assert res["n_treated_analysed"] == pytest.approx(n1 * (1 - attrition))


def test_planned_mde_of_cace_is_itt_mde_over_takeup_difference():
    # Bloom (1984): the complier effect is the ITT divided by the take-up difference, so
    # the smallest detectable complier effect is MDE_ITT / (c1 - c0); 0.7 - 0.1 = 0.6.
    res = pw.planned_power(n_treated=100, n_control=100, sd=1.0, takeup_treated=0.7, takeup_control=0.1)
    ref = TTestIndPower().solve_power(effect_size=None, nobs1=100, ratio=1.0, alpha=0.05, power=0.8)
    assert res["mde"] == pytest.approx(ref, rel=1e-5)           # solve_power's tolerance
    assert res["mde_cace"] == pytest.approx(res["mde"] / 0.6, rel=1e-12)
    with pytest.raises(ValueError, match="go together"):
        pw.planned_power(n_treated=100, n_control=100, takeup_treated=0.7)
    with pytest.raises(ValueError, match="must exceed"):
        pw.planned_power(n_treated=100, n_control=100, takeup_treated=0.2, takeup_control=0.3)


def test_cluster_attrition_shrinks_cluster_size_not_clusters():
    # Donner & Klar (2000): with m (1 - a) units observed per cluster the design effect is
    # 1 + (m (1 - a) - 1) rho and the df stay J - 2; written out here.
    m, rho, a, J = 20, 0.1, 0.25, 30
    res = pw.planned_power(n_treated=J / 2 * m, n_control=J / 2 * m, sd=1.0, icc=rho, cluster_size=m,
                           attrition=a)
    deff = 1 + (m * (1 - a) - 1) * rho
    n_arm = J / 2 * m * (1 - a)
    assert res["df"] == J - 2
    assert res["std_error"] == pytest.approx(np.sqrt(deff * 2 / n_arm), rel=1e-12)


def test_cli_power_missing_or_conflicting_options(tmp_path):
    quiet = copy_project("quiet-hours", tmp_path)
    clubs = copy_project("tutoring-clubs", tmp_path)
    result = power_cli(quiet)
    assert result.exit_code == 2 and "--sd is required" in result.stderr and "Traceback" not in result.output
    result = power_cli(clubs, "--sd", 10)
    assert result.exit_code == 2
    assert "--icc is required for a blocked_cluster design" in result.stderr
    result = power_cli(quiet, "--sd", 10, "--icc", 0.1)
    assert result.exit_code == 2 and "--icc applies to cluster designs only" in result.stderr
    result = power_cli(quiet, "--sd", 10, "--n-treated", 50, "--n-control", 50)
    assert result.exit_code == 2 and "the units table exists and gives the sizes" in result.stderr
    result = power_cli(without_data(quiet), "--sd", 10)
    assert result.exit_code == 2
    assert "no units table yet; give the planned sizes: --n-treated and --n-control" in result.stderr
    result = power_cli(quiet, "--sd", 10, "--n-treated", 50)
    assert result.exit_code == 2 and "--n-treated and --n-control go together" in result.stderr
    result = power_cli(quiet, "--sd", 10, "--n-treated", 5, "--n-control", 5, "--outcome", "visits")
    assert result.exit_code == 2 and "did you mean 'visits_after'?" in result.stderr


def test_plan_power_library_messages(tmp_path):
    quiet = copy_project("quiet-hours", tmp_path)
    with pytest.raises(ValueError, match=r"`sd` is required"):
        pw.plan_power(quiet)
    with pytest.raises(ValueError, match=r"`sd` must be a positive number; got 0"):
        pw.plan_power(quiet, sd=0)
    with pytest.raises(ValueError, match=r"`simulate` must be a whole number >= 0; got -1"):
        pw.plan_power(quiet, sd=1, simulate=-1)
    with pytest.raises(ValueError, match=r"`n_clusters` applies to cluster designs only"):
        pw.plan_power(quiet, sd=1, n_clusters=10)
    clubs = copy_project("tutoring-clubs", tmp_path)
    with pytest.raises(ValueError, match=r"cannot simulate: a blocked cluster design needs its blocks"):
        pw.plan_power(without_data(clubs), sd=1, icc=0.1, n_clusters=20, cluster_size=10, simulate=5)
    def complete_at_one_half(design):
        design.update(mechanism="complete", probability=0.5)
        del design["block"]

    share = edit_design(without_data(copy_project("arrival-signs", tmp_path / "b")), complete_at_one_half)
    with pytest.raises(ValueError, match=r"design.probability 0.5 treats 5 of 10 units; the planned sizes treat 4"):
        pw.plan_power(share, sd=1, n_treated=4, n_control=6)


def test_cli_power_simulation_reports_progress_and_defaults_to_the_mde(tmp_path):
    project = copy_project("quiet-hours", tmp_path)
    result = power_cli(project, "--sd", 50, "--simulate", 20, "--draws", 99, "--json")
    assert result.exit_code == 0, result.output
    sim = json.loads(result.stdout)["simulation"]
    analytic = json.loads(result.stdout)["analytic"]
    assert sim["effect_from"] == "mde" and sim["effect"] == pytest.approx(analytic["mde"])
    assert sim["seed"] == 42 and sim["n_sims"] == 20 and sim["draws"] == 99
    # C(12, 6) = 924 assignments: enumerated (at most max(draws, 10 000) and analysis.max_exact)
    assert sim["test_method"] == "exact" and sim["statistic"] == "mean_difference"
    assert sim["rejections"] == round(sim["power"] * 20)
    assert "simulated 20/20 experiments" in result.stderr and "simulated" not in result.stdout.split("{")[0]
    again = power_cli(project, "--sd", 50, "--simulate", 20, "--draws", 99, "--json")
    assert json.loads(again.stdout)["simulation"] == sim  # seeded: identical
    text = power_cli(project, "--sd", 50, "--simulate", 20, "--draws", 99).stdout
    assert f"simulated      {sim['power']:.3f} (Monte Carlo SE {sim['mc_std_error']:.3f}) at the MDE" in text


def test_plan_power_simulation_on_large_complete_design_is_near_statsmodels(tmp_path):
    # Reference: statsmodels TTestIndPower.power for n = 100 + 100, effect 0.4 SD;
    # the randomization test is asymptotically as powerful as the t test
    # (Lehmann & Romano 2005, ch. 15, from memory). Tolerance: 4 simulation SEs.
    project = without_data(copy_project("quiet-hours", tmp_path))
    calls = []
    plan = pw.plan_power(project, sd=2.0, effect=0.8, n_treated=100, n_control=100, simulate=200, draws=199,
                         seed=2027, progress=lambda done, total: calls.append((done, total)))
    expected = TTestIndPower().power(effect_size=0.4, nobs1=100, ratio=1.0, alpha=0.05)
    sim = plan.simulation
    assert abs(sim["power"] - expected) < 4 * np.sqrt(expected * (1 - expected) / 200)
    assert plan.analytic["power"] == pytest.approx(expected, rel=1e-9)
    assert calls == [(i, 200) for i in range(1, 201)]
    assert plan.sizes_from == "options" and plan.n_units == 200
    json.dumps(plan.to_dict(), allow_nan=False)


def test_plan_power_simulation_on_cluster_design_is_near_cluster_mean_t_test(tmp_path):
    # Reference: statsmodels TTestIndPower on 15 + 15 cluster means with SD
    # sd * sqrt(deff / m) (Donner & Klar 2000, ch. 2). The simulated outcomes
    # have total variance sd^2 and intraclass correlation rho. Tolerance: 4 SEs.
    project = as_cluster_design(copy_project("tutoring-clubs", tmp_path))
    m, rho, sd, effect, sims = 8, 0.2, 1.0, 0.45, 150
    plan = pw.plan_power(project, sd=sd, icc=rho, effect=effect, n_clusters=30, cluster_size=m,
                         simulate=sims, draws=199, seed=11)
    deff = 1 + (m - 1) * rho
    expected = TTestIndPower().power(effect_size=effect / (sd * np.sqrt(deff / m)), nobs1=15, ratio=1.0, alpha=0.05)
    assert plan.analytic["power"] == pytest.approx(expected, rel=1e-9)
    assert abs(plan.simulation["power"] - expected) < 4 * np.sqrt(expected * (1 - expected) / sims)
    assert (plan.n_clusters, plan.clusters_treated, plan.n_units) == (30, 15, 240)


def test_plan_power_matched_pairs_from_data(tmp_path):
    project = copy_project("arrival-signs", tmp_path)
    routes = pd.read_csv(project / "data" / "routes.csv")
    plan = pw.plan_power(project, sd=100.0, effect=80.0)
    assert plan.n_blocks == routes["pair"].nunique() == 14
    # Reference: statsmodels TTestIndPower with 14 + 14 units (pairs ignored analytically).
    expected = TTestIndPower().power(effect_size=0.8, nobs1=14, ratio=1.0, alpha=0.05)
    assert plan.analytic["power"] == pytest.approx(expected, rel=1e-9)
    # the complaints outcome is planned one-sided ('less'): the MDE is the size of a decrease
    less = pw.plan_power(project, sd=100.0, outcome="complaints", simulate=30, draws=99, seed=1)
    one_sided = TTestIndPower().solve_power(nobs1=14, ratio=1.0, alpha=0.05, power=0.8, alternative="larger")
    assert less.analytic["alternative"] == "less"
    assert less.analytic["mde"] == pytest.approx(100 * one_sided, rel=1e-5)
    assert less.simulation["effect"] == pytest.approx(-less.analytic["mde"])
    # 2**14 = 16384 assignments > 10 000: random draws
    assert less.simulation["test_method"] == "monte_carlo" and less.simulation["alternative"] == "less"


def test_plan_power_uses_the_share_treated_in_the_data(tmp_path):
    """3 of 8 units treated in the data: the plan uses 3 and 5, not 4 and 4 (counted by hand).

    Analytic power checked against statsmodels' two-sample t-test power with ratio 5/3.
    """
    from tests.bad_inputs.builder import Case, units_with

    units = units_with(("S7,1,", "S7,0,"))   # S1, S3, S5 treated
    project = Case(name="p", code=0, words=(), units=units).build(tmp_path)
    plan = pw.plan_power(project, sd=10.0, effect=12.0)
    assert (plan.analytic["n_treated"], plan.analytic["n_control"]) == (3, 5)
    # statsmodels TTestIndPower (outside reference): nobs1 = 3 treated, ratio = 5/3
    expected = TTestIndPower().power(effect_size=1.2, nobs1=3, ratio=5 / 3, alpha=0.05)
    assert plan.analytic["power"] == pytest.approx(expected, rel=1e-6)

"""The units of a planned design (private to ``planning/``): the options of a plan and the units it covers.

Read from the project's units table when it exists (actual arm sizes and
blocks, clusters), else built from the planned sizes given on the command line.
Used by :mod:`report_kit.planning.plan`.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from fractions import Fraction

import numpy as np
import pandas as pd

from report_kit.design.draw import draw_assignment
from report_kit.design.mechanism import number_treated
from report_kit.errors import DataError, DesignError
from report_kit.planning.core import _plain
from report_kit.inputs.data import load_units_for_assignment, resolve_inside
from report_kit.inputs.model import Spec

_BLOCKED = frozenset({"blocked", "blocked_cluster", "matched_pairs"})
_CLUSTERED = frozenset({"cluster", "blocked_cluster"})


@dataclass(frozen=True, kw_only=True)
class _PlanOptions:
    sd: float
    effect: float | None
    power: float
    icc: float
    cluster_size: float | None
    n_treated: int | None
    n_control: int | None
    n_clusters: int | None
    simulate: int
    draws: int
    seed: int | None

    @property
    def sizes_given(self) -> bool:
        return any(v is not None for v in (self.n_treated, self.n_control, self.n_clusters, self.cluster_size))


@dataclass(frozen=True, kw_only=True, eq=False)
class _PlannedUnits:
    """The units of a planned design, read from the units table or built from the planned sizes.

    ``ids`` is ``None`` when no unit-level design can be built (the simulation
    is then refused with ``why_not``); ``n_treated`` and ``n_control`` are
    expected numbers of units.
    """

    mechanism: str
    sizes_from: str
    units_table: str | None
    ids: np.ndarray | None
    block: np.ndarray | None
    cluster: np.ndarray | None
    probability: float
    n_units: int
    n_treated: float
    n_control: float
    n_blocks: int | None
    n_clusters: int | None
    clusters_treated: int | None
    cluster_size: float
    why_not: str = ""


# ----------------------------------------------------------------- the planned units


def _planned_units(spec: Spec, opts: _PlanOptions) -> _PlannedUnits:
    """The units from the units table when it exists, else from the planned sizes."""
    table = resolve_inside(spec.project_dir, spec.data.units, "data.units")
    if table.is_file():
        if opts.sizes_given:
            raise ValueError(f"{table}: the units table exists and gives the sizes; planned sizes "
                             "(`n_treated`, `n_control`, `n_clusters`, `cluster_size`) are for a design without data")
        return _units_from_table(spec)
    if not opts.sizes_given:
        needs = ("`cluster_size` with `n_clusters` (or `n_treated` and `n_control`)"
                 if spec.design.mechanism in _CLUSTERED else "`n_treated` and `n_control`")
        raise ValueError(f"{table}: no units table yet; give the planned sizes: {needs}")
    return _units_from_sizes(spec, opts)


def _share(spec: Spec) -> float:
    """Share treated of the real draw: ``design.probability``, 0.5 when absent (always 0.5 for pairs)."""
    if spec.design.mechanism == "matched_pairs" or spec.design.probability is None:
        return 0.5
    return float(spec.design.probability)


def _share_in_data(spec: Spec, frame) -> float | None:
    """Share treated in the units table's treatment column, when it holds both arms as 0/1.

    Used instead of 0.5 when ``design.probability`` is absent, so a study that
    treated 185 of 445 units is planned with those arm sizes. Shares of
    clusters for cluster designs; not used for Bernoulli designs (their
    probability is the plan) nor matched pairs (one of two by construction).
    """
    col, kind = spec.design.treatment, spec.design.mechanism
    if spec.design.probability is not None or kind in ("bernoulli", "matched_pairs") or col not in frame.columns:
        return None
    z = pd.to_numeric(frame[col], errors="coerce")
    if z.isna().any() or not z.isin([0, 1]).all() or z.nunique() < 2:
        return None
    if kind in _CLUSTERED:
        z = z.groupby(frame[spec.design.cluster].to_numpy()).first()
    return float(Fraction(int(z.sum()), int(z.size)))


def _units_from_table(spec: Spec) -> _PlannedUnits:
    frame = load_units_for_assignment(spec, treated_count=number_treated)
    kind, design = spec.design.mechanism, spec.design
    ids = frame[spec.data.id].to_numpy()
    block = frame[design.block].to_numpy() if kind in _BLOCKED else None
    cluster = frame[design.cluster].to_numpy() if kind in _CLUSTERED else None
    p = _share_in_data(spec, frame)
    p = _share(spec) if p is None else p
    try:  # the real draw validates ids, labels, nesting and pairs
        draw_assignment(kind, ids, seed=0, block=block, cluster=cluster, probability=p)
    except (DataError, DesignError) as err:
        raise type(err)(f"{spec.project_dir / spec.data.units}: {err}") from err
    units = _describe_units(kind, ids, block, cluster, p, sizes_from="data", units_table=spec.data.units)
    return _actual_arms(units, frame, spec.design.treatment)


def _actual_arms(units: _PlannedUnits, frame, treatment: str) -> _PlannedUnits:
    """The planned units with the actual arm sizes when the treatment column is filled."""
    if treatment not in frame.columns:
        return units
    z = frame[treatment].to_numpy()
    try:
        zf = z.astype(float)
    except (TypeError, ValueError):
        return units
    if np.isnan(zf).any() or not np.isin(zf, (0, 1)).all():
        return units
    n1 = int(zf.sum())
    clusters_treated = None if units.cluster is None else int(np.unique(units.cluster[zf == 1]).size)
    return replace(units, sizes_from="assignment", n_treated=float(n1), n_control=float(zf.size - n1),
                   clusters_treated=clusters_treated)


def _codes(labels: np.ndarray) -> np.ndarray:
    return np.unique(labels, return_inverse=True)[1].reshape(-1)


def _describe_units(kind: str, ids, block, cluster, p: float, *, sizes_from: str,
                    units_table: str | None) -> _PlannedUnits:
    """Sizes of a unit-level design: expected arm sizes, clusters, blocks (see :func:`plan_power`)."""
    n = int(ids.size)
    ccodes = None if cluster is None else _codes(cluster)
    bcodes = None if block is None else _codes(block)
    n_clusters = None if ccodes is None else int(ccodes.max()) + 1
    if kind == "bernoulli":
        n1, treated_groups = Fraction(repr(p)) * n, None
    else:
        group = np.arange(n) if ccodes is None else ccodes
        stratum = np.zeros(n, np.intp) if bcodes is None else bcodes
        n1, treated_groups = Fraction(0), 0
        for s in np.unique(stratum):
            inside = stratum == s
            size = np.unique(group[inside]).size
            k = number_treated(p, size)
            n1 += Fraction(k, size) * int(inside.sum())
            treated_groups += k
    return _PlannedUnits(
        mechanism=kind, sizes_from=sizes_from, units_table=units_table, ids=ids, block=block, cluster=cluster,
        probability=p, n_units=n, n_treated=float(n1), n_control=float(n - n1),
        n_blocks=None if bcodes is None else int(bcodes.max()) + 1, n_clusters=n_clusters,
        clusters_treated=None if ccodes is None else treated_groups,
        cluster_size=1.0 if n_clusters is None else n / n_clusters,
    )


def _units_from_sizes(spec: Spec, opts: _PlanOptions) -> _PlannedUnits:
    kind = spec.design.mechanism
    if kind in _CLUSTERED:
        return _clusters_from_sizes(spec, opts)
    n1, n0 = opts.n_treated, opts.n_control
    n = n1 + n0
    if kind == "matched_pairs" and n1 != n0:
        raise ValueError(f"matched pairs treat one unit of each pair: `n_treated` must equal `n_control`; "
                         f"got {n1} and {n0}")
    _agree_with_spec(spec, n1, n, "units")
    if kind == "blocked":
        return _PlannedUnits(
            mechanism=kind, sizes_from="options", units_table=None, ids=None, block=None, cluster=None,
            probability=n1 / n, n_units=n, n_treated=float(n1), n_control=float(n0), n_blocks=None,
            n_clusters=None, clusters_treated=None, cluster_size=1.0,
            why_not=f"a blocked design needs its blocks; put the units table at {spec.data.units}",
        )
    block = np.arange(n) // 2 if kind == "matched_pairs" else None
    p = 0.5 if kind == "matched_pairs" else n1 / n
    units = _describe_units(kind, np.arange(n), block, None, p, sizes_from="options", units_table=None)
    return replace(units, n_treated=float(n1), n_control=float(n0))  # exact, also for bernoulli


def _clusters_from_sizes(spec: Spec, opts: _PlanOptions) -> _PlannedUnits:
    kind, m = spec.design.mechanism, opts.cluster_size
    if m is None:
        raise ValueError(f"`cluster_size` is required for a {kind} design without data: "
                         "the planned (average) number of units per cluster")
    if opts.n_clusters is not None:
        total = opts.n_clusters
        treated = number_treated(_share(spec), total)
        if not 0 < treated < total:
            raise DesignError(f"{total} cluster(s) at share {_share(spec)} leave an arm empty; both arms are needed")
        j1, j0 = Fraction(treated), Fraction(total - treated)
    else:
        j1, j0 = Fraction(opts.n_treated) / Fraction(repr(m)), Fraction(opts.n_control) / Fraction(repr(m))
        _agree_with_spec(spec, j1, j1 + j0, "clusters")
    whole = m.is_integer() and j1.denominator == 1 and j0.denominator == 1
    n1, n0 = float(j1 * Fraction(repr(m))), float(j0 * Fraction(repr(m)))
    if kind == "cluster" and whole:
        n_clusters, size = int(j1 + j0), int(m)
        ids = np.arange(n_clusters * size)
        return _describe_units(kind, ids, None, ids // size, int(j1) / n_clusters, sizes_from="options",
                               units_table=None)
    why = (f"a blocked cluster design needs its blocks; put the units table at {spec.data.units}"
           if kind == "blocked_cluster" else
           f"the planned sizes give {float(j1):g} treated and {float(j0):g} control clusters of {m:g} units; "
           "the simulation needs whole clusters")
    return _PlannedUnits(
        mechanism=kind, sizes_from="options", units_table=None, ids=None, block=None, cluster=None,
        probability=float(j1 / (j1 + j0)), n_units=_plain(n1 + n0), n_treated=n1, n_control=n0, n_blocks=None,
        n_clusters=_plain(float(j1 + j0)) if (j1 + j0).denominator == 1 else None,
        clusters_treated=int(j1) if j1.denominator == 1 else None, cluster_size=m, why_not=why,
    )


def _agree_with_spec(spec: Spec, treated, total, what: str) -> None:
    """Planned sizes must agree with ``design.probability`` when the spec gives one."""
    p = spec.design.probability
    if p is None or spec.design.mechanism == "matched_pairs" or Fraction(treated).denominator != 1:
        return
    expected = number_treated(p, int(total))
    if expected != treated:
        raise ValueError(f"design.probability {p:g} treats {expected} of {int(total)} {what}; "
                         f"the planned sizes treat {int(treated)}")

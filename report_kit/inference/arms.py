"""Randomization inference for multi-arm trials: contrast tests, intervals and the omnibus test.

Owns:

* :func:`between_arms` - the omnibus statistic ``sum_k n_k (ybar_k - ybar)^2``;
* :func:`omnibus_test` - its randomization test under the full multi-arm
  mechanism (sharp null: no arm changes any unit's outcome), exact by
  enumerating every multinomial assignment when there are few;
* :func:`contrast_tests` - per contrast ``a`` vs ``r``, the randomization test
  and the test-inversion interval that re-randomize only the units of the two
  arms compared, holding the other units' arms and the two arms' sizes (within
  blocks): the two-arm mechanism of the same kind on those units, with the
  public functions of :mod:`report_kit.inference.randomization`.

Definitions and sources in ``docs/methods/arms.md``.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np

from report_kit.design.arms import ArmSource, MultiArmMechanism
from report_kit.design.mechanism import mechanism_from_arrays
from report_kit.errors import ReportKitWarning
from report_kit.inference.engine import ChunkMap, StoredDraws, _Draws, chunk_rows, observed_statistics, run_pass
from report_kit.inference.pvalues import DEFAULT_RTOL, DrawnStatistics, null_centre
from report_kit.inference.multiplicity import benjamini_hochberg, holm, westfall_young
from report_kit.inference.randomization import TestResult, invert_test, randomization_test

__all__ = ["OMNIBUS", "ArmDraws", "ArmPass", "ArmTest", "arm_draws", "arm_multiplicity", "between_arms", "contrast_joint_null",
           "contrast_tests", "omnibus_null", "omnibus_statistic", "omnibus_test"]

OMNIBUS = "between_arms"


@dataclass(frozen=True, kw_only=True)
class ArmTest:
    """A contrast's test and interval (or the omnibus test: ``arm`` and ``reference`` None)."""

    arm: str | None
    reference: str | None
    test: TestResult
    interval: dict | None = None

    def test_row(self) -> dict:
        return {"outcome": self.test.outcome, "arm": self.arm, "reference": self.reference, **self.test.to_dict()}

    def interval_row(self) -> dict | None:
        if self.interval is None:
            return None
        return {"outcome": self.interval["outcome"], "arm": self.arm, "reference": self.reference,
                **self.interval}


def between_arms(y, assignments, n_arms: int) -> np.ndarray:
    """Between-arm sum of squares ``sum_k n_k (ybar_k - ybar)^2`` for each assignment row.

    Units with a missing outcome are left out (``n_k`` counts observed units).
    Computed as ``sum_k S_k^2 / n_k - S^2 / N`` with ``S_k`` the arm sums. It is
    the numerator sum of squares of the one-way ANOVA F statistic (Fisher 1925),
    a monotone function of F when the units and outcomes are fixed.

    Parameters
    ----------
    y : array_like, shape (n,)
    assignments : array_like of int, shape (rows, n) or (n,)
        Arm codes 0..K-1.
    n_arms : int
    """
    y = np.asarray(y, dtype=float)
    a = np.atleast_2d(np.asarray(assignments))
    if a.shape[1] != y.size:
        raise ValueError(f"`assignments` must have {y.size} columns; got {a.shape[1]}")
    seen = ~np.isnan(y)
    if y.size >= _BINCOUNT_UNITS:
        return _between_arms_by_row(y, seen, a, int(n_arms))
    yo, a = y[seen], a[:, seen]
    total = yo.sum()
    stat = np.full(a.shape[0], -total * total / max(yo.size, 1))
    for k in range(int(n_arms)):
        member = a == k
        size = member.sum(axis=1)
        sums = member @ yo
        with np.errstate(invalid="ignore", divide="ignore"):
            stat += np.where(size > 0, sums * sums / np.maximum(size, 1), 0.0)
    return stat


#: From this many units on, :func:`between_arms` sums each row's arms with ``bincount`` (no
#: row-by-unit temporaries); below it, one vectorised product per arm over all rows is faster.
_BINCOUNT_UNITS = 5000


def _between_arms_by_row(y: np.ndarray, seen: np.ndarray, a: np.ndarray, n_arms: int) -> np.ndarray:
    """:func:`between_arms` row by row: arm sums and observed counts by ``bincount`` (large designs)."""
    yo = np.where(seen, y, 0.0)
    weight = seen.astype(float)
    total = y[seen].sum()
    stat = np.full(a.shape[0], -total * total / max(int(seen.sum()), 1))
    for r in range(a.shape[0]):
        codes = a[r].astype(np.intp)
        sums = np.bincount(codes, weights=yo, minlength=n_arms)[:n_arms]
        sizes = np.bincount(codes, weights=weight, minlength=n_arms)[:n_arms]
        with np.errstate(invalid="ignore", divide="ignore"):
            stat[r] += np.where(sizes > 0, sums * sums / np.maximum(sizes, 1), 0.0).sum()
    return stat


class ArmDraws(_Draws):
    """Monte Carlo multi-arm assignments, generated chunk by chunk on demand (never all held at once).

    Chunk ``i`` is :meth:`report_kit.design.arms.MultiArmMechanism.sample_chunk`
    (``sample_block(rows, SeedSequence(seed, spawn_key=(i,)))``), made by
    whichever process runs the chunk.
    """

    def __init__(self, source: ArmSource):
        self.mechanism: MultiArmMechanism = source.mechanism
        self.method, self.draws, self.seed = source.method, int(source.draws), int(source.seed)
        self.n = self.mechanism.n
        self.rows = self.mechanism.chunk_rows()

    def chunk(self, i: int) -> tuple[np.ndarray, np.ndarray | None]:
        return self.mechanism.sample_chunk(i, self.draws, self.seed), None


def arm_draws(source: ArmSource) -> _Draws:
    """The multi-arm assignments of ``source`` as the engine's draws.

    Monte Carlo: :class:`ArmDraws`, generated per chunk when a pass needs it
    (memory does not grow with the number of draws). Exact: every assignment
    (at most ``analysis.max_exact`` of them) listed once and kept, in chunks of
    :func:`chunk_rows`. Every multi-arm procedure passes over these with
    :func:`report_kit.inference.engine.run_pass`, so the chunk seam
    (``chunk_map``) and the counting rules of :mod:`report_kit.inference.pvalues`
    are the engine's.
    """
    mech: MultiArmMechanism = source.mechanism
    if source.method != "exact":
        return ArmDraws(source)
    z = np.concatenate([np.asarray(c, dtype=np.uint8) for c in source.chunks()])
    rows = chunk_rows(mech.n)
    return StoredDraws(source.method, mech.n, rows, [(z[s:s + rows], None) for s in range(0, z.shape[0], rows)])


def omnibus_statistic(Y, n_arms: int):
    """The engine statistic ``block -> (rows, m)``: :func:`between_arms` of each column of ``Y``."""
    Y = np.asarray(Y, dtype=float)
    if Y.ndim == 1:
        Y = Y[:, None]

    def statistic(block: np.ndarray) -> np.ndarray:
        return np.column_stack([between_arms(Y[:, j], block, n_arms) for j in range(Y.shape[1])])

    return statistic


class ArmPass:
    """Every statistic a multi-arm study needs, on ONE pass over its draws (each chunk generated once).

    Register with :meth:`add_omnibus` (the between-arm sums of squares of the
    columns of a matrix: outcomes, covariates, a missing-outcome indicator) and
    :meth:`add_contrasts` (contrast differences for Westfall–Young), call
    :meth:`run` once, then read each result back with its handle. The pass is
    :func:`report_kit.inference.engine.run_pass` over :func:`arm_draws`, so its
    chunk seam and counting rules are the engine's; results do not depend on
    which statistics share the pass.
    """

    def __init__(self, source: ArmSource):
        self.source = source
        self._statistics: list = []
        self._observed: list[np.ndarray] = []
        self._nulls: list[np.ndarray] | None = None
        self._weights: np.ndarray | None = None

    def _add(self, statistic) -> int:
        if self._nulls is not None:
            raise ValueError("this pass has run; register every statistic before `run`")
        self._statistics.append(statistic)
        (observed,) = observed_statistics([statistic], np.asarray(self.source.mechanism.arm, dtype=float), 1)
        self._observed.append(observed)
        return len(self._statistics) - 1

    def add_omnibus(self, Y) -> int:
        """Register :func:`between_arms` of each column of ``Y``; returns the handle for :meth:`omnibus`."""
        return self._add(omnibus_statistic(Y, self.source.mechanism.n_arms))

    def add_contrasts(self, Y, pairs, *, block=None) -> int:
        """Register the contrast differences of :func:`contrast_joint_null`; returns the handle for :meth:`contrasts`."""
        return self._add(_contrast_statistic(np.asarray(Y, dtype=float), pairs, self.source.mechanism, block))

    def run(self, chunk_map: ChunkMap | None = None) -> ArmPass:
        """The one pass over the draws (once; returns ``self``)."""
        if self._nulls is None:
            if self._statistics:
                self._nulls, self._weights = run_pass(arm_draws(self.source), self._statistics,
                                                      chunk_map=chunk_map)
            else:
                self._nulls = []
        return self

    def _null(self, handle: int) -> np.ndarray:
        if self._nulls is None:
            raise ValueError("call `run` before reading a result")
        return self._nulls[handle]

    def omnibus(self, handle: int) -> DrawnStatistics:
        """Observed ``(m,)`` and null ``(B, m)`` between-arm statistics (larger is more extreme)."""
        return DrawnStatistics(observed=self._observed[handle], null=self._null(handle), method=self.source.method,
                               weights=self._weights)

    def contrasts(self, handle: int, alternatives) -> tuple[np.ndarray, np.ndarray]:
        """Observed ``(m,)`` and null ``(B, m)`` contrast statistics, oriented so that larger is more extreme.

        ``greater`` keeps a column, ``less`` negates it, ``two-sided`` takes the
        distance from the null centre of the engine
        (:func:`report_kit.inference.pvalues.null_centre`).
        """
        observed_all, drawn = self._observed[handle], self._null(handle)
        observed, null = [], []
        for j, alt in enumerate(alternatives):
            t, draws = observed_all[j], drawn[:, j]
            if alt == "less":
                t, draws = -t, -draws
            elif alt == "two-sided":
                centre = null_centre(t, draws[np.isfinite(draws)], None, self.source.method)
                t, draws = abs(t - centre), np.abs(draws - centre)
            observed.append(t)
            null.append(draws)
        return np.asarray(observed), np.column_stack(null)


def omnibus_null(Y, source: ArmSource, *, chunk_map: ChunkMap | None = None) -> DrawnStatistics:
    """Observed ``(m,)`` and null ``(B, m)`` ``between_arms`` statistics of the columns of ``Y`` on ``source``.

    A pass of its own; a study shares one pass among all its statistics with :class:`ArmPass`.
    """
    shared = ArmPass(source)
    handle = shared.add_omnibus(Y)
    return shared.run(chunk_map).omnibus(handle)


def omnibus_test(Y, source: ArmSource, *, outcomes, rtol: float = DEFAULT_RTOL,
                 chunk_map: ChunkMap | None = None, drawn: DrawnStatistics | None = None) -> list[ArmTest]:
    """Randomization test of the sharp null that no arm changes any outcome, per column of ``Y``.

    Upper-tailed on :func:`between_arms` under the multi-arm mechanism of
    ``source``; the p-value rule (exact share, or Phipson & Smyth 2010 for
    draws), the tie rule and the Monte Carlo standard error are the engine's
    (:func:`report_kit.inference.pvalues.tail_p_values`). ``drawn``: the
    statistics from a shared :class:`ArmPass` (``ArmPass.omnibus``) instead of a
    pass of its own (``Y`` is then not used and may be None).
    """
    dist = drawn if drawn is not None else omnibus_null(Y, source, chunk_map=chunk_map)
    p, se, defined = dist.p_values(rtol)
    out = []
    for j, name in enumerate(outcomes):
        result = TestResult(outcome=name, statistic=OMNIBUS, alternative="greater", null_effect=0.0,
                            observed=float(dist.observed[j]), p_value=float(p[j]), method=source.method,
                            draws=int(defined[j]), mc_std_error=None if np.isnan(se[j]) else float(se[j]))
        out.append(ArmTest(arm=None, reference=None, test=result))
    return out


def contrast_tests(y, arm, pairs, *, kind: str, block=None, cluster=None, statistic: str = "mean_difference",
                   alternative: str = "two-sided", level: float = 0.95, max_exact: int = 200000,
                   draws: int = 10000, seed: int = 5150, outcome: str = "y",
                   chunk_map: ChunkMap | None = None) -> list[ArmTest]:
    """Randomization test and test-inversion interval of each ``(arm, reference)`` pair.

    Only the units of the two arms compared are re-randomized: the two-arm
    mechanism of ``kind`` on those units (conditioning on the number in ``arm``
    per block, or per cluster count), so the other units keep their arms and the
    two arms their sizes. Sharp null ``Y_i(arm) = Y_i(reference) + tau0``.
    ``chunk_map`` runs the chunks of the passes (results do not depend on it).
    """
    labels = np.asarray([str(v) for v in arm], dtype=object)
    y = np.asarray(y, dtype=float)
    out = []
    for a, r in pairs:
        mask = (labels == a) | (labels == r)
        z = (labels[mask] == a).astype(int)
        mech = mechanism_from_arrays(kind, z, block=None if block is None else np.asarray(block)[mask],
                                     cluster=None if cluster is None else np.asarray(cluster)[mask])
        source = mech.assignments(max_exact=max_exact, draws=draws, seed=seed)
        (test,) = randomization_test(y[mask], mech, source=source, statistic=statistic,
                                     alternative=alternative, outcomes=[outcome], chunk_map=chunk_map)
        interval = invert_test(y[mask], mech, source=source, level=level, outcome=outcome,
                               chunk_map=chunk_map).to_dict()
        out.append(ArmTest(arm=a, reference=r, test=test, interval=interval))
    return out


def arm_multiplicity(tests, outcomes, *, lead: str | None = None, joint=None) -> list[dict]:
    """Holm, Benjamini–Hochberg and (with shared draws) Westfall–Young adjustment of the contrasts.

    A family holds every contrast test (rows of ``tests`` with an ``arm``) of
    every outcome declared in that family (``outcomes[i].family``): with K arms
    and ``reference`` contrasts a family of m outcomes has ``m (K - 1)``
    hypotheses. Omnibus rows are not adjusted.

    ``joint`` maps a family to ``(keys, observed, null, method)`` from
    :func:`contrast_joint_null` (``keys`` = ``(outcome, arm, reference)`` in
    column order): the contrasts on the shared multi-arm draws under the sharp
    null that no arm matters. Westfall–Young min-p step-down adjusted p-values
    come from them, raised to at least the contrast's own randomization p-value.
    A family without shared draws and ``lead = 'westfall_young'`` is led by Holm
    (valid under any dependence, Holm 1979), with a warning.

    Returns ``{outcome, arm, reference, family, method, p_value, p_adjusted, lead}`` rows.
    """
    joint = joint or {}
    family_of = {o.column: o.family for o in outcomes}
    rows = []
    for family in dict.fromkeys(o.family for o in outcomes):
        members = [t for t in tests if t.get("arm") is not None and family_of.get(t["outcome"]) == family]
        tested = [t for t in members if t.get("p_value") is not None]
        p = np.array([t["p_value"] for t in tested], dtype=float)
        adjusted = {"holm": dict(zip(map(id, tested), holm(p).tolist() if p.size else [])),
                    "bh": dict(zip(map(id, tested), benjamini_hochberg(p).tolist() if p.size else []))}
        if family in joint and tested:
            adjusted["westfall_young"] = _westfall_young(tested, *joint[family])
        family_lead = lead
        if lead == "westfall_young" and "westfall_young" not in adjusted and members:
            warnings.warn(f"analysis.multiplicity 'westfall_young': no shared draws for the {family} contrasts "
                          "(Westfall–Young needs every outcome of the family tested by mean_difference); Holm "
                          "leads instead", ReportKitWarning, stacklevel=2)
            family_lead = "holm"
        for method, by_id in adjusted.items():
            for t in members:
                rows.append({"outcome": t["outcome"], "arm": t["arm"], "reference": t["reference"],
                             "family": family, "method": method, "p_value": t.get("p_value"),
                             "p_adjusted": by_id.get(id(t)), "lead": method == family_lead})
    return rows


def _westfall_young(tested, keys, observed, null, method) -> dict[int, float]:
    column = {key: j for j, key in enumerate(keys)}
    cols = [column[(t["outcome"], t["arm"], t["reference"])] for t in tested]
    null = np.asarray(null, dtype=float)[:, cols]
    keep = np.isfinite(null).all(axis=1)
    if not keep.any():
        return {}
    adjusted = westfall_young(np.asarray(observed, dtype=float)[cols], null[keep], method=method)
    return {id(t): max(float(v), float(t["p_value"])) for t, v in zip(tested, adjusted)}

def _contrast_statistics(y: np.ndarray, assignments: np.ndarray, a: int, r: int, block: np.ndarray | None,
                         weight: np.ndarray | None) -> np.ndarray:
    """Difference in means of arm ``a`` minus arm ``r`` for each assignment row (block-weighted with blocks)."""
    seen = ~np.isnan(y)
    y0 = np.where(seen, y, 0.0)
    strata = [np.ones(y.size, dtype=bool)] if block is None else [block == b for b in range(int(block.max()) + 1)]
    total = np.zeros(assignments.shape[0])
    for s, members in enumerate(strata):
        parts = []
        for k in (a, r):
            member = (assignments == k) & (seen & members)[None, :]
            with np.errstate(invalid="ignore", divide="ignore"):
                parts.append((member @ y0) / member.sum(axis=1))
        share = 1.0 if weight is None else weight[s]
        total = total + share * (parts[0] - parts[1])
    return total


def _contrast_statistic(Y: np.ndarray, pairs, mech: MultiArmMechanism, block):
    """The engine statistic of :func:`contrast_joint_null`: one column per ``(column, arm code, reference code)``."""
    codes = None if block is None else np.unique(np.asarray(block), return_inverse=True)[1].ravel()
    weights = []
    for _, a, r in pairs:
        weight = None
        if codes is not None:
            counts = np.bincount(codes[np.isin(mech.arm, (a, r))], minlength=int(codes.max()) + 1)
            weight = counts / counts.sum()
        weights.append(weight)

    def statistic(block_z: np.ndarray) -> np.ndarray:
        return np.column_stack([_contrast_statistics(Y[:, col], block_z, a, r, codes, w)
                                for (col, a, r), w in zip(pairs, weights)])

    return statistic


def contrast_joint_null(Y, pairs, source: ArmSource, *, alternatives, block=None,
                        chunk_map: ChunkMap | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Observed ``(m,)`` and null ``(B, m)`` contrast statistics on the shared multi-arm draws, oriented.

    Column ``j`` is the difference in means (block-weighted, with weights the
    blocks' shares of the two arms' units) of contrast ``pairs[j] = (column,
    arm code, reference code)`` of ``Y``, under every assignment of ``source``
    (the sharp null that no arm changes any outcome). Oriented so that larger
    is more extreme (:meth:`ArmPass.contrasts`). Input of Westfall–Young. A
    pass of its own; a study shares one with :class:`ArmPass`.
    """
    shared = ArmPass(source)
    handle = shared.add_contrasts(Y, pairs, block=block)
    return shared.run(chunk_map).contrasts(handle, alternatives)

"""Adjusted p-values for several outcomes tested within one family.

Owns: Holm (1979) step-down, Benjamini–Hochberg (1995) step-up and the
Westfall–Young (1993) step-down resampling adjustments, and the
``multiplicity`` section of ``results.json``. Families (primary, secondary,
exploratory) are adjusted separately.
"""

from __future__ import annotations

import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from report_kit.errors import DataError, DesignError, ReportKitWarning
from report_kit.inference.pvalues import DEFAULT_RTOL, tie_tolerance
from report_kit.inputs.model import FAMILIES, MULTIPLICITY
from report_kit.validate import METHODS, check_choice

__all__ = [
    "ADJUSTMENTS",
    "SharedNull",
    "benjamini_hochberg",
    "holm",
    "multiplicity_table",
    "study_multiplicity",
    "westfall_young",
]

#: Adjustments reported for every family, in ``results.json`` order.
ADJUSTMENTS = ("holm", "bh", "westfall_young")
WY_KINDS = ("min_p", "max_t")


def _check_p(p) -> np.ndarray:
    try:
        arr = np.asarray(p, dtype=float)
    except (TypeError, ValueError) as err:
        raise ValueError("`p` must be a sequence of numbers") from err
    if arr.ndim != 1:
        raise ValueError(f"`p` must be one-dimensional; got shape {arr.shape}")
    if not (np.isfinite(arr).all() and (arr >= 0).all() and (arr <= 1).all()):
        raise ValueError("`p` must hold p-values in [0, 1] (no NaN)")
    return arr


def holm(p) -> np.ndarray:
    r"""Holm (1979) step-down adjusted p-values (family-wise error rate).

    With the p-values sorted, :math:`p_{(1)} \le \dots \le p_{(m)}`,

    .. math:: \tilde p_{(i)} = \max_{j \le i} \min\{1, (m - j + 1)\, p_{(j)}\}.

    Returned in the input order. Rejecting :math:`\tilde p \le \alpha` controls
    the family-wise error rate at :math:`\alpha` under any dependence.
    """
    arr = _check_p(p)
    m = arr.size
    if m == 0:
        return arr.copy()
    order = np.argsort(arr, kind="stable")
    stepped = np.maximum.accumulate((m - np.arange(m)) * arr[order])
    out = np.empty(m)
    out[order] = np.minimum(1.0, stepped)
    return out


def benjamini_hochberg(p) -> np.ndarray:
    r"""Benjamini–Hochberg (1995) step-up adjusted p-values (false discovery rate).

    With the p-values sorted, :math:`p_{(1)} \le \dots \le p_{(m)}`,

    .. math:: \tilde p_{(i)} = \min_{j \ge i} \min\{1, m\, p_{(j)} / j\}.

    Returned in the input order. Rejecting :math:`\tilde p \le q` controls the
    false discovery rate at :math:`q` for independent or positively dependent
    (PRDS) tests (Benjamini & Yekutieli 2001).
    """
    arr = _check_p(p)
    m = arr.size
    if m == 0:
        return arr.copy()
    order = np.argsort(arr, kind="stable")
    scaled = arr[order] * m / np.arange(1, m + 1)
    out = np.empty(m)
    out[order] = np.minimum(1.0, np.minimum.accumulate(scaled[::-1])[::-1])
    return out


# ---------------------------------------------------------------------------
# Westfall–Young
# ---------------------------------------------------------------------------


def _check_wy(observed, null, method: str, kind: str, weights, tolerance
              ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    check_choice("method", method, METHODS)
    if kind not in WY_KINDS:
        raise ValueError(f"`kind` must be one of {{'min_p', 'max_t'}}; got {kind!r}")
    obs = np.asarray(observed, dtype=float)
    nul = np.asarray(null, dtype=float)
    if obs.ndim != 1:
        raise ValueError(f"`observed` must be one-dimensional (m,); got shape {obs.shape}")
    if nul.ndim != 2 or nul.shape[1] != obs.size or nul.shape[0] == 0:
        raise ValueError(f"`null` must have shape (B, {obs.size}) with B >= 1; got {nul.shape}")
    if not (np.isfinite(obs).all() and np.isfinite(nul).all()):
        raise DataError("`observed` and `null` must be finite")
    if weights is None:
        w = np.ones(nul.shape[0])
    else:
        if method != "exact":
            raise ValueError("`weights` apply to exact enumeration only; Monte Carlo draws follow the mechanism")
        w = np.asarray(weights, dtype=float)
        if w.shape != (nul.shape[0],) or not np.isfinite(w).all() or (w < 0).any() or w.sum() <= 0:
            raise ValueError(f"`weights` must be {nul.shape[0]} finite non-negative numbers with a positive sum")
    if tolerance is None:
        tol = tie_tolerance(obs, nul, None, DEFAULT_RTOL)
    else:
        tol = np.asarray(tolerance, dtype=float)
        if tol.shape != obs.shape or not np.isfinite(tol).all() or (tol < 0).any():
            raise ValueError(f"`tolerance` must hold {obs.size} finite numbers >= 0")
    if method == "monte_carlo":
        nul = np.vstack([obs[None, :], nul])  # the +1 rule: the observed draw counts
        w = np.ones(nul.shape[0])
    return obs, nul, w, tol


def _upper_share(col: np.ndarray, w: np.ndarray, x: np.ndarray, tol: float) -> np.ndarray:
    """Weight share of the draws of ``col`` at least as large as each ``x`` less the tie tolerance.

    With unit weights the tail sums are whole numbers, so the share is exactly
    ``count / N``.
    """
    order = np.argsort(col, kind="stable")
    tail = np.concatenate([np.cumsum(w[order][::-1])[::-1], [0.0]])
    return tail[np.searchsorted(col[order], x - tol, side="left")] / w.sum()


def _step_down(order: np.ndarray, hits: np.ndarray, w: np.ndarray) -> np.ndarray:
    mass = (w @ hits) / w.sum()
    if (mass <= 0).any():
        raise DesignError(
            "the exact enumeration does not contain the observed assignment "
            "(no draw is as extreme as the observed statistics)"
        )
    adjusted = np.maximum.accumulate(np.minimum(1.0, mass))
    out = np.empty(order.size)
    out[order] = adjusted
    return out


def westfall_young(observed, null, *, method: str, kind: str = "min_p", weights=None,
                   tolerance=None) -> np.ndarray:
    r"""Westfall–Young (1993) step-down adjusted p-values from shared randomization draws.

    Parameters
    ----------
    observed : array_like, shape (m,)
        Observed test statistics, oriented so that larger is more extreme
        (e.g. the absolute mean difference for a two-sided test).
    null : array_like, shape (B, m)
        The same statistics recomputed on ``B`` assignment draws, the *same*
        draws for every column, so the dependence between outcomes is kept.
    method : {'exact', 'monte_carlo'}
        ``"exact"``: the rows are the full enumeration (the observed
        assignment is among them). ``"monte_carlo"``: random draws; the
        observed statistics are added as one more row (the +1 rule).
    kind : {'min_p', 'max_t'}, default 'min_p'
        ``"min_p"`` first turns each column into marginal p-values, so
        outcomes on different scales weigh equally; ``"max_t"`` compares the
        raw statistics and suits statistics already on one scale.
    weights : array_like, shape (B,), optional
        Probabilities of the enumerated assignments when they are not equally
        likely (exact enumeration of a Bernoulli design); counts below become
        probability masses.
    tolerance : array_like, shape (m,), optional
        Tie tolerance of each column; default the engine's scale-free rule
        :func:`~report_kit.inference.pvalues.tie_tolerance` on the oriented
        statistics. Pass the tolerance of the marginal tests (``JointNull.tolerance``)
        so that the raw p-values agree with them exactly.

    Returns
    -------
    numpy.ndarray, shape (m,)
        Adjusted p-values in the input order; each is at least the raw
        randomization p-value and they are monotone in the raw order.

    Notes
    -----
    Let :math:`N` be the number of rows used (:math:`B`, or :math:`B+1` for
    Monte Carlo). For ``min_p``, with raw p-values
    :math:`p_j = \#\{b: T^b_j \ge t_j\}/N` sorted as
    :math:`p_{(1)} \le \dots \le p_{(m)}` (hypotheses :math:`r_1,\dots,r_m`),
    and :math:`p^b_j` the same p-value of row :math:`b`'s own statistic,

    .. math:: \tilde p_{(i)} = \max_{k \le i}\;
              \frac{\#\{b : \min_{l \ge k} p^b_{r_l} \le p_{(k)}\}}{N}

    (Westfall & Young 1993; Ge, Dudoit & Speed 2003). For ``max_t`` the statistics are
    sorted :math:`t_{(1)} \ge \dots \ge t_{(m)}` and
    :math:`\tilde p_{(i)} = \max_{k \le i} \#\{b : \max_{l \ge k} T^b_{r_l}
    \ge t_{(k)}\}/N`. A draw is at least as extreme when
    :math:`T \ge t - tol`, the engine's tie rule (relative to the magnitude of
    the statistics, so scale-free). Step-down
    resampling controls the family-wise error rate strongly under subset
    pivotality, without assuming independence.
    """
    obs, nul, w, tol = _check_wy(observed, null, method, kind, weights, tolerance)
    if kind == "max_t":
        order = np.argsort(-obs, kind="stable")
        succ = np.maximum.accumulate(nul[:, order][:, ::-1], axis=1)[:, ::-1]
        hits = succ >= (obs - tol)[order][None, :]
        return _step_down(order, hits, w)
    m = obs.size
    raw = np.array([_upper_share(nul[:, j], w, obs[j:j + 1], tol[j])[0] for j in range(m)])
    pb = np.column_stack([_upper_share(nul[:, j], w, nul[:, j], tol[j]) for j in range(m)])
    order = np.argsort(raw, kind="stable")
    succ = np.minimum.accumulate(pb[:, order][:, ::-1], axis=1)[:, ::-1]
    hits = succ <= raw[order][None, :] * (1 + 1e-12)
    return _step_down(order, hits, w)


# ---------------------------------------------------------------------------
# results.json section
# ---------------------------------------------------------------------------


@dataclass(frozen=True, kw_only=True)
class SharedNull:
    """Statistics of one family recomputed on shared assignment draws.

    ``outcomes`` names the columns of ``null`` (outcome columns from the
    spec); ``observed`` and ``null`` are oriented so larger = more extreme;
    ``weights`` and ``tolerance`` as in :func:`westfall_young`.
    """

    outcomes: tuple[str, ...]
    observed: np.ndarray
    null: np.ndarray
    method: str
    kind: str = "min_p"
    weights: np.ndarray | None = None
    tolerance: np.ndarray | None = None


def _as_shared_null(family: str, value) -> SharedNull:
    if isinstance(value, SharedNull):
        return value
    if not isinstance(value, Mapping):
        raise ValueError(f"`null_by_family[{family!r}]` must be a SharedNull or a mapping; "
                         f"got {type(value).__name__}")
    missing = {"outcomes", "observed", "null", "method"} - set(value)
    if missing:
        raise ValueError(f"`null_by_family[{family!r}]` lacks keys {sorted(missing)}")
    return SharedNull(outcomes=tuple(value["outcomes"]), observed=np.asarray(value["observed"]),
                      null=np.asarray(value["null"]), method=value["method"],
                      kind=value.get("kind", "min_p"), weights=value.get("weights"),
                      tolerance=value.get("tolerance"))


def _main_test(tests: Sequence[Mapping], spec) -> Mapping | None:
    """The test entry of an outcome's pre-specified statistic at the null of no effect."""
    found = [
        t for t in tests
        if t.get("outcome") == spec.column
        and t.get("statistic", spec.statistic) == spec.statistic
        and t.get("null_effect") in (None, 0, 0.0)
        and t.get("subgroup") is None
    ]
    if len(found) > 1:
        raise ValueError(f"`tests` has {len(found)} entries for outcome {spec.column!r} with its "
                         f"statistic {spec.statistic!r} at null_effect 0; expected one")
    return found[0] if found else None


def _usable_shared(shared: SharedNull, tested: list[str]) -> SharedNull | None:
    """The shared draws of the outcomes that have a test, on the draws where all of them are defined.

    An outcome without a test (no observed unit in an arm) is left out, and so
    is a draw under which some statistic is undefined (e.g. a Bernoulli draw
    with an empty arm), as the raw randomization p-values count only draws
    with a defined statistic. ``None`` when nothing is left to adjust.
    """
    index = {name: j for j, name in enumerate(shared.outcomes)}
    absent = [c for c in tested if c not in index]
    if absent:
        raise ValueError(f"shared null draws cover outcomes {list(shared.outcomes)}; "
                         f"the family's tested outcomes {absent} are not among them")
    if not tested:
        return None
    cols = [index[c] for c in tested]
    null = np.asarray(shared.null, dtype=float)[:, cols]
    keep = np.isfinite(null).all(axis=1)
    if not keep.all():
        warnings.warn(f"Westfall–Young adjustment: {int((~keep).sum())} of {keep.size} assignment draws leave "
                      "a test statistic undefined (an arm without observed units) and are left out",
                      ReportKitWarning, stacklevel=3)
        if not keep.any():
            return None
    weights = None if shared.weights is None else np.asarray(shared.weights, dtype=float)[keep]
    tolerance = None if shared.tolerance is None else np.asarray(shared.tolerance, dtype=float)[cols]
    return SharedNull(outcomes=tuple(tested), observed=np.asarray(shared.observed, dtype=float)[cols],
                      null=null[keep], method=shared.method, kind=shared.kind, weights=weights,
                      tolerance=tolerance)


def _family_adjustments(columns, pvals, shared: SharedNull | None) -> dict[str, dict[str, float]]:
    tested = [c for c in columns if pvals[c] is not None]
    p = np.array([pvals[c] for c in tested], dtype=float)
    out = {"holm": dict(zip(tested, holm(p).tolist())),
           "bh": dict(zip(tested, benjamini_hochberg(p).tolist()))}
    if shared is not None:
        shared = _usable_shared(shared, tested)
    if shared is not None:
        adj = westfall_young(shared.observed, shared.null, method=shared.method, kind=shared.kind,
                             weights=shared.weights, tolerance=shared.tolerance)
        out["westfall_young"] = dict(zip(shared.outcomes, adj.tolist()))
    return out


def study_multiplicity(tests: Sequence[Mapping], outcomes, null_by_family: Mapping | None = None,
                       *, lead: str | None = None) -> list[dict]:
    """The ``multiplicity`` section of ``results.json``.

    Parameters
    ----------
    tests : sequence of dict
        The ``results.json`` ``tests`` list. For each outcome the entry with
        the outcome's pre-specified statistic at ``null_effect`` 0 (or None)
        and no subgroup is used; outcomes without one get None.
    outcomes : sequence of OutcomeSpec
        The spec's outcomes; ``family`` groups them.
    null_by_family : mapping, optional
        ``family -> SharedNull`` (or a mapping with keys ``outcomes,
        observed, null, method`` and optional ``kind``). When given for a
        family, Westfall–Young entries are added for it. Build the draws with
        the same seed as the tests so the raw p-values agree.
    lead : {'none', 'holm', 'bh', 'westfall_young'}, optional
        The spec's ``analysis.multiplicity``; entries of that method get
        ``lead: true``.

    Returns
    -------
    list of dict
        ``{outcome, family, method, p_value, p_adjusted, lead}`` for every
        outcome and every method computed (``holm``, ``bh`` and, when draws
        are given, ``westfall_young``); ``p_value`` is the raw p-value from
        ``tests``. Families are adjusted separately.
    """
    if lead is not None and lead not in MULTIPLICITY:
        raise ValueError(f"`lead` must be one of {{'none', 'holm', 'bh', 'westfall_young'}}; got {lead!r}")
    shared = {f: _as_shared_null(f, v) for f, v in (null_by_family or {}).items()}
    unknown = sorted(set(shared) - set(FAMILIES))
    if unknown:
        raise ValueError(f"`null_by_family` keys must be families {set(FAMILIES)}; got {unknown}")
    pvals = {}
    for spec in outcomes:
        entry = _main_test(tests, spec)
        p = None if entry is None else entry.get("p_value")
        pvals[spec.column] = None if p is None else float(p)
    entries = []
    for family in FAMILIES:
        columns = [o.column for o in outcomes if o.family == family]
        if not columns:
            continue
        if lead == "westfall_young" and family not in shared and any(pvals[c] is not None for c in columns):
            raise ValueError(f"analysis.multiplicity is 'westfall_young' but no shared null draws "
                             f"were given for family {family!r}")
        adjusted = _family_adjustments(columns, pvals, shared.get(family))
        for column in columns:
            for method in ADJUSTMENTS:
                if method not in adjusted:
                    continue
                entries.append({
                    "outcome": column, "family": family, "method": method,
                    "p_value": pvals[column],
                    "p_adjusted": adjusted[method].get(column),
                    "lead": method == lead,
                })
    return entries


def multiplicity_table(entries: Sequence[Mapping]) -> list[dict]:
    """The ``multiplicity`` rows pivoted to one row per outcome (the report's table).

    Parameters
    ----------
    entries : sequence of mappings
        The ``multiplicity`` section (:func:`study_multiplicity`).

    Returns
    -------
    list of dict
        ``{outcome, family, p_value, adjusted, lead_method}`` in the order the
        outcomes first appear; ``adjusted`` maps each method of
        :data:`ADJUSTMENTS` that was computed to its adjusted p-value, and
        ``lead_method`` is the pre-specified method (None when none leads).
        Entries that carry ``arm`` and ``reference`` (multi-arm contrasts) give
        one row per outcome and contrast, ``{outcome, arm, reference, family,
        p_value, adjusted, lead_method}``.
    """
    if isinstance(entries, (str, bytes)) or not isinstance(entries, Sequence):
        raise TypeError(f"`entries` must be a sequence of mappings; got {type(entries).__name__}")
    rows: dict[tuple, dict] = {}
    for i, entry in enumerate(entries):
        if not isinstance(entry, Mapping):
            raise TypeError(f"`entries[{i}]` must be a mapping; got {type(entry).__name__}")
        contrast = {k: entry[k] for k in ("arm", "reference") if k in entry}
        key = (entry["outcome"], *contrast.values(), entry["family"])
        row = rows.setdefault(key, {"outcome": entry["outcome"], **contrast, "family": entry["family"],
                                    "p_value": entry.get("p_value"), "adjusted": {}, "lead_method": None})
        row["adjusted"][entry["method"]] = entry.get("p_adjusted")
        if entry.get("lead"):
            row["lead_method"] = entry["method"]
    for row in rows.values():
        row["adjusted"] = {m: row["adjusted"][m] for m in ADJUSTMENTS if m in row["adjusted"]}
    return list(rows.values())

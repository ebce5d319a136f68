"""Rerandomized designs (Morgan & Rubin 2012): acceptance criterion, seeded draw, acceptable assignments.

Owns what ``design.rerandomization`` adds to a mechanism: the Mahalanobis
imbalance of the covariate means (:func:`mahalanobis_imbalance`), the
:class:`Rerandomization` criterion, the reproducible draw from a seed
(:func:`draw_rerandomized`, used by ``assign`` and ``check``) and the
assignment source that conditions randomization inference on acceptance
(:func:`rerandomized_assignments`). Definitions in
``docs/methods/rerandomization.md``.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np

from report_kit.design.arguments import _check_seed
from report_kit.design.draw import _draw_plan
from report_kit.design.mechanism import AssignmentSource, Mechanism
from report_kit.errors import DesignError

__all__ = ["ACCEPT_RTOL", "Rerandomization", "RerandomizedSource", "draw_rerandomized",
           "mahalanobis_imbalance", "rerandomized_assignments"]

#: Relative slack of the acceptance rule ``M <= max_distance * (1 + ACCEPT_RTOL)``, so that the
#: same assignment is accepted however the distances were batched (floating-point sums).
ACCEPT_RTOL = 1e-9
#: Candidates drawn at most before giving up (the criterion is then too strict for the design).
MAX_CANDIDATES = 10_000_000


def _covariate_matrix(x, n: int | None = None) -> np.ndarray:
    arr = np.asarray(x, dtype=np.float64)
    if arr.ndim == 1:
        arr = arr[:, None]
    if arr.ndim != 2 or arr.shape[1] == 0 or (n is not None and arr.shape[0] != n):
        raise ValueError(f"covariates must have shape (n, p) with p >= 1{'' if n is None else f' and n = {n}'}; "
                         f"got {np.shape(x)}")
    if not np.all(np.isfinite(arr)):
        raise ValueError("covariates must be finite numbers with no missing value")
    return arr


def _inverse_covariance(x: np.ndarray) -> np.ndarray:
    cov = np.atleast_2d(np.cov(x, rowvar=False, ddof=1))
    if np.linalg.matrix_rank(cov) < cov.shape[0]:
        raise DesignError("the rerandomization covariates are constant or collinear; their covariance matrix "
                          "cannot be inverted — drop the redundant covariate(s)")
    return np.linalg.inv(cov)


def mahalanobis_imbalance(x, z) -> np.ndarray:
    """Mahalanobis distance of the covariate means between arms (Morgan & Rubin 2012).

    ``M = (n1 n0 / n) (xbar1 - xbar0)' S^{-1} (xbar1 - xbar0)`` with ``S`` the
    sample covariance (divisor ``n - 1``) of the covariates over all ``n``
    units; ``(n1 n0 / n)^{-1} S`` is the randomization covariance of
    ``xbar1 - xbar0`` under complete randomization, so ``M`` is approximately
    chi-squared with ``p`` degrees of freedom.

    Parameters
    ----------
    x : array_like, shape (n,) or (n, p)
    z : array_like of 0/1, shape (n,) or (B, n)

    Returns
    -------
    ndarray, shape (B,) (or a 0-d array for one assignment); NaN where an arm is empty.
    """
    x = _covariate_matrix(x)
    zz = np.asarray(z, dtype=np.float64)
    single = zz.ndim == 1
    zz = np.atleast_2d(zz)
    if zz.shape[1] != x.shape[0]:
        raise ValueError(f"`z` must have {x.shape[0]} columns (one per unit); got shape {np.shape(z)}")
    out = _distances(x, _inverse_covariance(x), zz)
    return out[0] if single else out


def _distances(x: np.ndarray, inv: np.ndarray, zz: np.ndarray) -> np.ndarray:
    n = x.shape[0]
    n1 = zz.sum(axis=1)
    n0 = n - n1
    s1 = zz @ x
    with np.errstate(divide="ignore", invalid="ignore"):
        d = s1 / n1[:, None] - (x.sum(axis=0)[None, :] - s1) / n0[:, None]
        return (n1 * n0 / n) * np.einsum("bi,ij,bj->b", d, inv, d)


@dataclass(frozen=True, kw_only=True, eq=False)
class Rerandomization:
    """Accept an assignment when ``M <= max_distance`` (see :func:`mahalanobis_imbalance`).

    Build with :meth:`from_arrays`. ``x`` is in the units' order of the mechanism.
    """

    covariates: tuple[str, ...]
    x: np.ndarray
    max_distance: float
    inverse: np.ndarray

    @classmethod
    def from_arrays(cls, x, max_distance: float, covariates=None) -> Rerandomization:
        x = _covariate_matrix(x)
        if isinstance(max_distance, bool) or not isinstance(max_distance, (int, float)) \
                or not np.isfinite(max_distance) or max_distance <= 0:
            raise ValueError(f"`max_distance` must be a positive finite number; got {max_distance!r}")
        names = tuple(covariates) if covariates is not None else tuple(f"x{j}" for j in range(x.shape[1]))
        if len(names) != x.shape[1]:
            raise ValueError(f"`covariates` must name each of the {x.shape[1]} columns; got {len(names)}")
        x.setflags(write=False)
        return cls(covariates=names, x=x, max_distance=float(max_distance), inverse=_inverse_covariance(x))

    def distances(self, zz: np.ndarray) -> np.ndarray:
        """``M`` of each row of ``zz`` (shape ``(B, n)``)."""
        return _distances(self.x, self.inverse, np.atleast_2d(np.asarray(zz, dtype=np.float64)))

    def accepts(self, zz: np.ndarray) -> np.ndarray:
        """Boolean ``(B,)``: ``M <= max_distance * (1 + ACCEPT_RTOL)``."""
        with np.errstate(invalid="ignore"):
            return self.distances(zz) <= self.max_distance * (1.0 + ACCEPT_RTOL)


def draw_rerandomized(kind: str, ids, criterion: Rerandomization, *, seed: int, block=None, cluster=None,
                      probability=None, max_candidates: int = MAX_CANDIDATES) -> tuple[np.ndarray, int]:
    """Draw an assignment from ``seed`` by rejection until it meets ``criterion``.

    Algorithm (reproducible from the spec alone): ``rng =
    numpy.random.default_rng(seed)``; draw a candidate exactly as
    :func:`~report_kit.design.draw.draw_assignment` does (units sorted by
    id, blocks and clusters by label), continuing the same ``rng`` for each
    further candidate; return the first candidate with ``M <= max_distance``
    (Morgan & Rubin 2012). The first candidate is the plain draw of
    ``design.seed``.

    Returns
    -------
    (z, candidates)
        ``z`` (uint8, in ``ids`` order) and the number of candidates drawn.

    Raises
    ------
    DesignError
        No candidate accepted among ``max_candidates``.
    """
    seed = _check_seed(seed)
    draw = _draw_plan(kind, ids, block=block, cluster=cluster, probability=probability)
    if criterion.x.shape[0] != np.asarray(ids).size:
        raise ValueError("the criterion's covariates must have one row per id")
    rng = np.random.default_rng(seed)
    for tried in range(1, max_candidates + 1):
        z = draw(rng)
        if criterion.accepts(z[None, :])[0]:
            return z, tried
    raise DesignError(f"no assignment with Mahalanobis distance at most {criterion.max_distance:g} among "
                      f"{max_candidates:,} candidates; design.rerandomization.max_distance is too strict")


@dataclass(frozen=True, kw_only=True, eq=False)
class RerandomizedSource(AssignmentSource):
    """The acceptable assignments of a rerandomized design (exact) or random ones (Monte Carlo).

    Exact: every assignment of the mechanism that the criterion accepts.
    Monte Carlo: the mechanism's seeded draws (:meth:`Mechanism.sample_chunks`)
    with the rejected ones left out, until ``draws`` are accepted - the same
    accept/reject rule as the real draw, so each acceptable assignment is
    equally likely.

    Attributes
    ----------
    criterion : Rerandomization
    candidates : int
        Assignments examined: all of them (exact), or the draws needed for ``draws`` acceptances.
    """

    criterion: Rerandomization
    candidates: int

    @property
    def acceptance_rate(self) -> float:
        """Accepted / examined: exact when enumerated, an estimate under Monte Carlo."""
        return self.draws / self.candidates

    def chunks(self) -> Iterator[np.ndarray]:
        if self.method == "exact":
            return self._accepted(self.mechanism.enumerate_chunks(self.chunk_size), None)
        return self._accepted(self.mechanism.sample_chunks(self.candidates, self.seed, self.chunk_size), self.draws)

    def _accepted(self, chunks, limit: int | None) -> Iterator[np.ndarray]:
        kept = 0
        for chunk in chunks:
            rows = chunk[self.criterion.accepts(chunk)]
            if limit is not None:
                rows = rows[: limit - kept]
            kept += rows.shape[0]
            if rows.shape[0]:
                yield rows
            if limit is not None and kept >= limit:
                return

    def weights(self, chunk: np.ndarray) -> np.ndarray | None:
        return None


def rerandomized_assignments(mechanism: Mechanism, criterion: Rerandomization, *, max_exact: int, draws: int,
                             seed: int, max_candidates: int = MAX_CANDIDATES) -> RerandomizedSource:
    """Assignments of a rerandomized design for randomization inference, conditioned on acceptance.

    Enumerates the mechanism's assignments when there are at most
    ``max_exact`` and keeps the acceptable ones (``draws`` is then their exact
    count); otherwise keeps the first ``draws`` acceptable assignments among
    the mechanism's seeded random draws.

    Raises
    ------
    DesignError
        The observed assignment fails the criterion (it could not have been
        drawn), a ``bernoulli`` design, or too few acceptances among ``max_candidates``.
    """
    if mechanism.kind == "bernoulli":
        raise DesignError("rerandomization needs a fixed number treated; a bernoulli design has none")
    if criterion.x.shape[0] != mechanism.n:
        raise ValueError("the criterion's covariates must have one row per unit of the mechanism")
    observed = float(criterion.distances(mechanism.z[None, :])[0])
    if not criterion.accepts(mechanism.z[None, :])[0]:
        raise DesignError(f"the recorded assignment has Mahalanobis distance {observed:.4g} on "
                          f"{', '.join(criterion.covariates)}, above design.rerandomization.max_distance "
                          f"{criterion.max_distance:g}; it cannot come from this rerandomized design")
    base = mechanism.assignments(max_exact=max_exact, draws=draws, seed=seed)
    if base.method == "exact":
        total = mechanism.count()
        src = RerandomizedSource(mechanism=mechanism, method="exact", draws=0, seed=None, criterion=criterion,
                                 candidates=total)
        accepted = sum(chunk.shape[0] for chunk in src.chunks())
        return RerandomizedSource(mechanism=mechanism, method="exact", draws=accepted, seed=None,
                                  criterion=criterion, candidates=total)
    examined = _candidates_for(mechanism, criterion, draws, seed, max_candidates)
    return RerandomizedSource(mechanism=mechanism, method="monte_carlo", draws=draws, seed=seed,
                              criterion=criterion, candidates=examined)


def _candidates_for(mechanism: Mechanism, criterion: Rerandomization, draws: int, seed: int,
                    max_candidates: int) -> int:
    """How many of the seeded draws it takes to accept ``draws`` of them."""
    kept = seen = 0
    for chunk in mechanism.sample_chunks(max_candidates, seed):
        ok = np.flatnonzero(criterion.accepts(chunk))
        if kept + ok.size >= draws:
            return seen + int(ok[draws - kept - 1]) + 1
        kept += ok.size
        seen += chunk.shape[0]
    raise DesignError(f"only {kept:,} of {max_candidates:,} random assignments meet the rerandomization "
                      f"criterion (max_distance {criterion.max_distance:g}); {draws:,} are needed")

"""Exact null laws of linear randomization statistics, found without listing assignments.

Owns the laws on an integer lattice that the exact tests of
:mod:`report_kit.inference.exact_tests` build on:

* :func:`treated_sum_law` - law of ``U = sum_i Z_i q_i`` when ``k`` of ``n``
  units with integer scores ``q`` are treated completely at random:
  hypergeometric when ``q`` takes at most two values, otherwise the
  characteristic-function algorithm of Pagano & Tritchler (1983) on a
  two-dimensional FFT grid;
* :func:`weighted_block_law` - law of ``sum_b g_b U_b`` over independent
  blocks with integer multipliers ``g_b``, by convolving the per-block laws.

Every law is a :class:`LatticeLaw`: probabilities of the consecutive integers
``offset, offset + 1, ...``. Definitions, error bounds and sources are in
``docs/methods/exact.md``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import signal, stats

__all__ = ["LatticeLaw", "LatticeTooLarge", "treated_sum_law", "weighted_block_law", "DEFAULT_MAX_CELLS"]

#: Largest FFT grid (cells x distinct scores) or lattice length accepted before giving up.
DEFAULT_MAX_CELLS = 2_000_000_000
#: Largest ``M x D`` block held in memory at once (a few arrays of this many float64 values).
_MAX_ROW_CELLS = 5_000_000
#: Grid cells with ``log|G|`` below this are left out (each contributes less than 1e-39).
_NEGLIGIBLE = -90.0
#: Probability left outside the FFT windows (per window, Bernstein bound; see :func:`_window`).
_WINDOW_EPS = 1e-20


class LatticeTooLarge(ValueError):
    """The exact law would need more memory or time than allowed; the message says why."""


@dataclass(frozen=True, kw_only=True, eq=False)
class LatticeLaw:
    """Probabilities of the integers ``offset, offset + 1, ..., offset + len(pmf) - 1``.

    Attributes
    ----------
    offset : int
    pmf : ndarray of float64
        Non-negative, summing to 1 up to rounding.
    algorithm : str
        How the law was found (``"point mass"``, ``"hypergeometric"``,
        ``"characteristic function (FFT)"``, with ``" + block convolution"``
        when blocks were combined).
    """

    offset: int
    pmf: np.ndarray
    algorithm: str

    @property
    def support(self) -> np.ndarray:
        """The lattice points ``offset + arange(len(pmf))`` as int64."""
        return self.offset + np.arange(self.pmf.size, dtype=np.int64)

    def mean(self) -> float:
        return float(self.support.astype(np.float64) @ self.pmf)


# =========================================================================== validation


def _check_scores(q) -> np.ndarray:
    arr = np.asarray(q)
    if arr.ndim != 1 or arr.size == 0:
        raise ValueError(f"`q` must be a non-empty one-dimensional array of integers; got shape {arr.shape}")
    if arr.dtype.kind not in "iu":
        if arr.dtype.kind != "f" or not np.all(np.isfinite(arr)) or np.any(arr != np.round(arr)):
            raise TypeError("`q` must hold integers (integer dtype or integer-valued floats)")
    arr = arr.astype(np.int64)
    if np.abs(arr).max() > 2**40:
        raise ValueError("`q` must hold integers of magnitude at most 2**40")
    return arr


def _check_treated(k, n: int) -> int:
    if isinstance(k, bool) or not isinstance(k, (int, np.integer)) or not 0 <= int(k) <= n:
        raise ValueError(f"`n_treated` must be an integer in [0, {n}]; got {k!r}")
    return int(k)


# =========================================================================== one block


def treated_sum_law(q, n_treated: int, *, max_cells: int = DEFAULT_MAX_CELLS) -> LatticeLaw:
    """Exact law of the treated sum ``U = sum_i Z_i q_i`` under complete randomization.

    Every subset of ``k = n_treated`` of the ``n`` units is equally likely
    (probability ``1 / C(n, k)``), as in Fisher's (1935) randomization test.

    * ``q`` constant: ``U = k q_1``.
    * ``q`` takes two values ``a < b``: ``U = k a + (b - a) X`` with ``X``
      hypergeometric (``n`` units, ``#{q_i = b}`` successes, ``k`` draws); the
      tests built on it are Fisher's exact test (Fisher 1935; Agresti 2013, 3.5).
    * otherwise the characteristic-function algorithm (Pagano & Tritchler
      1983): with ``p = k / n`` and independent ``Z_i ~ Bernoulli(p)``,
      ``G(x, t) = prod_v ((1 - p) + p x t^(v - c))^(m_v)`` (``m_v`` units with
      score ``v``, ``c`` the rounded mean score) is the joint generating
      function of ``(J, S) = (sum Z_i, sum Z_i (q_i - c))``; it is evaluated on an
      ``N x M`` grid of roots of unity, and two inverse DFTs give
      ``P(J = k, S = s)``, which divided by the binomial ``P(J = k)`` is the
      law of ``U - k c`` (given ``J = k`` all subsets are equally likely).
      ``N`` and ``M`` cover the whole support, or a window outside which a
      Bernstein bound leaves less than ``1e-20`` of the mass (the aliased
      mass); the absolute error of each probability is then below
      ``4e-20 / P(J = k)`` plus FFT rounding (about ``1e-15`` relative to
      the largest probability). Cost: ``N * M * D`` complex logarithms for
      ``D`` distinct scores.

    Parameters
    ----------
    q : array_like of int, shape (n,)
    n_treated : int
    max_cells : int
        Refuse (:class:`LatticeTooLarge`) when ``N * M * D`` exceeds this.

    Returns
    -------
    LatticeLaw
    """
    q = _check_scores(q)
    k = _check_treated(n_treated, q.size)
    values, counts = np.unique(q, return_counts=True)
    if values.size == 1 or k in (0, q.size):
        offset = 0 if k == 0 else int(q.sum()) if k == q.size else k * int(values[0])
        return LatticeLaw(offset=offset, pmf=np.ones(1), algorithm="point mass")
    if values.size == 2:
        return _hypergeometric_law(values, counts, k)
    return _fft_law(values, counts, k, max_cells)


def _hypergeometric_law(values: np.ndarray, counts: np.ndarray, k: int) -> LatticeLaw:
    """``U = k a + (b - a) X``, ``X ~ hypergeom(n, m_b, k)``, laid on the integer lattice."""
    a, b = int(values[0]), int(values[1])
    n, m_b = int(counts.sum()), int(counts[1])
    x = np.arange(max(0, k - (n - m_b)), min(k, m_b) + 1)
    probs = stats.hypergeom.pmf(x, n, m_b, k)
    step = b - a
    pmf = np.zeros((x.size - 1) * step + 1)
    pmf[::step] = probs
    return LatticeLaw(offset=k * a + step * int(x[0]), pmf=pmf, algorithm="hypergeometric")


def _window(variance: float, bound: float, eps: float = _WINDOW_EPS) -> int:
    """Half-width ``u`` with ``P(|X - E X| >= u) <= eps`` by Bernstein's inequality.

    For a sum of independent centred terms bounded by ``bound`` with total
    variance ``variance``: ``P(|X - EX| >= u) <= 2 exp(-u^2 / (2 (variance +
    bound u / 3)))`` (Bernstein 1924; Boucheron, Lugosi & Massart 2013, 2.8).
    """
    log_term = math.log(2.0 / eps)
    lin = 2.0 * log_term * bound / 3.0
    return int(math.ceil((lin + math.sqrt(lin * lin + 8.0 * log_term * variance)) / 2.0)) + 1


def _fft_law(values: np.ndarray, counts: np.ndarray, k: int, max_cells: int) -> LatticeLaw:
    n = int(counts.sum())
    p = k / n
    centre = int(round(float(values @ counts) / n))
    v = values - centre
    # the support of S given J = k, and windows holding all but eps of (J, S) under the tilt
    low = int(np.sort(np.repeat(v, counts))[:k].sum())
    high = int(np.sort(np.repeat(v, counts))[-k:].sum())
    mean_s = p * float(v @ counts)
    u_s = _window(p * (1 - p) * float((v * v) @ counts), float(np.abs(v).max()))
    lo = max(low, int(math.floor(mean_s)) - u_s)
    hi = min(high, int(math.ceil(mean_s)) + u_s)
    size_m = hi - lo + 1  # every alias s + beta * M of a window point lies outside the window
    size_n = min(n + 1, _window(n * p * (1 - p), 1.0) + 1)
    cells = size_n * size_m * v.size
    if cells > max_cells or size_m * v.size > _MAX_ROW_CELLS:
        raise LatticeTooLarge(f"the FFT grid would need {size_n} x {size_m} x {v.size} = {cells:,} cells "
                              f"(limits: {max_cells:,} in all, {_MAX_ROW_CELLS:,} per x frequency)")
    probs = _fft_conditional(v, counts, k, p, size_n, size_m)
    start = lo % size_m
    pmf = np.roll(probs, -start)[: hi - lo + 1]
    pmf = np.clip(pmf, 0.0, None)
    pmf /= pmf.sum()
    return LatticeLaw(offset=lo + k * centre, pmf=pmf, algorithm="characteristic function (FFT)")


def _fft_conditional(v: np.ndarray, counts: np.ndarray, k: int, p: float, size_n: int, size_m: int) -> np.ndarray:
    """``P(S = s | J = k)`` for ``s`` modulo ``size_m`` from the grid of the generating function.

    Each factor is ``z = (1 - p) + p e^(i phi)`` with ``phi = 2 pi a / N - 2 pi b v / M``:
    ``log|z| = log1p(-2 p (1 - p) (1 - cos phi)) / 2`` and ``arg z = atan2(p sin phi,
    1 - p + p cos phi)``. Grid cells with ``log|G| < -90`` (each below ``1e-39``)
    are left out, which moves no probability by more than ``N * M * 1e-39 /
    P(J = k)``. ``G(-a, -b) = conj(G(a, b))`` halves the ``x`` frequencies.
    """
    theta = (-2.0 * np.pi / size_m) * np.outer(np.arange(size_m), v).astype(np.float64)  # (M, D)
    weights = counts.astype(np.float64)
    probe = np.argsort(-weights, kind="stable")[:8]  # a few factors bound |G| from above (each <= 1)
    h = np.zeros(size_m, dtype=np.complex128)
    neg = (-np.arange(size_m)) % size_m
    for a in range(size_n // 2 + 1):
        shift = 2.0 * np.pi * a / size_n
        rows = np.flatnonzero(_log_modulus(theta[:, probe] + shift, weights[probe], p) > _NEGLIGIBLE)
        phi = theta[rows] + shift
        log_mag = _log_modulus(phi, weights, p)
        keep = log_mag > _NEGLIGIBLE
        rows, phi, log_mag = rows[keep], phi[keep], log_mag[keep]
        if rows.size == 0:
            continue
        arg = np.arctan2(p * np.sin(phi), (1.0 - p) + p * np.cos(phi)) @ weights
        c = np.zeros(size_m, dtype=np.complex128)
        c[rows] = np.exp(log_mag + 1j * (arg - 2.0 * np.pi * a * k / size_n))
        h += c
        if 0 < a and 2 * a != size_n:
            h += np.conj(c[neg])
    joint = np.fft.ifft(h).real / size_n
    return joint / stats.binom.pmf(k, int(counts.sum()), p)


def _log_modulus(phi: np.ndarray, weights: np.ndarray, p: float) -> np.ndarray:
    """``sum_v m_v log|(1 - p) + p e^(i phi_v)|`` per row of ``phi``."""
    with np.errstate(divide="ignore"):
        return 0.5 * (np.log1p(-2.0 * p * (1.0 - p) * (1.0 - np.cos(phi))) @ weights)


# =========================================================================== blocks


def weighted_block_law(laws, multipliers, *, max_length: int = 50_000_000) -> LatticeLaw:
    """Exact law of ``sum_b g_b U_b`` for independent block laws ``U_b`` and integers ``g_b > 0``.

    Blocks are randomized independently, so the law is the convolution of the
    laws of ``g_b U_b`` (each ``U_b`` law spread to every ``g_b``-th lattice
    point); convolutions by FFT (``scipy.signal.fftconvolve``), pairwise in a
    balanced tree, negative rounding residue clipped to 0 and the result
    renormalised (absolute error about ``1e-15`` relative to the largest
    probability).

    Parameters
    ----------
    laws : sequence of LatticeLaw
    multipliers : sequence of int
    max_length : int
        Refuse (:class:`LatticeTooLarge`) when the result would have more lattice points.
    """
    laws = list(laws)
    mult = [int(g) for g in multipliers]
    if not laws or len(mult) != len(laws) or any(g <= 0 for g in mult):
        raise ValueError("`laws` and `multipliers` must be non-empty, of equal length, with positive multipliers")
    if not all(isinstance(law, LatticeLaw) for law in laws):
        raise TypeError("`laws` must hold LatticeLaw objects")
    length = sum(g * (law.pmf.size - 1) for g, law in zip(mult, laws)) + 1
    if length > max_length:
        raise LatticeTooLarge(f"the combined lattice would have {length:,} points (limit {max_length:,})")
    parts = [(g * law.offset, _dilate(law.pmf, g)) for g, law in zip(mult, laws)]
    while len(parts) > 1:
        parts = [_convolve(parts[i], parts[i + 1]) if i + 1 < len(parts) else parts[i]
                 for i in range(0, len(parts), 2)]
    offset, pmf = parts[0]
    pmf = np.clip(pmf, 0.0, None)
    pmf /= pmf.sum()
    names = sorted({law.algorithm for law in laws if law.algorithm != "point mass"}) or ["point mass"]
    suffix = " + block convolution" if len(laws) > 1 else ""
    return LatticeLaw(offset=int(offset), pmf=pmf, algorithm=" and ".join(names) + suffix)


def _dilate(pmf: np.ndarray, g: int) -> np.ndarray:
    if g == 1:
        return pmf
    out = np.zeros((pmf.size - 1) * g + 1)
    out[::g] = pmf
    return out


def _convolve(left: tuple[int, np.ndarray], right: tuple[int, np.ndarray]) -> tuple[int, np.ndarray]:
    (o1, a), (o2, b) = left, right
    if min(a.size, b.size) <= 64:
        out = np.convolve(a, b)
    else:
        out = np.clip(signal.fftconvolve(a, b), 0.0, None)
    return o1 + o2, out

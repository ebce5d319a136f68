"""Assignment chunks built for the tests of checks/, independently of the randomization engine."""

from __future__ import annotations

import itertools

import numpy as np


def exact_complete(n: int, n1: int) -> np.ndarray:
    """Every assignment of a complete design with n1 treated, one row each."""
    rows = []
    for treated in itertools.combinations(range(n), n1):
        z = np.zeros(n, dtype=np.uint8)
        z[list(treated)] = 1
        rows.append(z)
    return np.array(rows)


def exact_bernoulli(n: int) -> np.ndarray:
    """Every 0/1 vector of length n (Bernoulli design enumeration)."""
    return np.array(list(itertools.product((0, 1), repeat=n)), dtype=np.uint8)


def mc_complete(z: np.ndarray, draws: int, seed: int) -> np.ndarray:
    """Seeded random permutations of ``z``, one row per draw."""
    rng = np.random.default_rng(seed)
    return rng.permuted(np.tile(np.asarray(z, dtype=np.uint8), (draws, 1)), axis=1)


def split(Z: np.ndarray, size: int) -> list[np.ndarray]:
    """``Z`` cut into chunks of ``size`` rows."""
    return [Z[i:i + size] for i in range(0, Z.shape[0], size)]

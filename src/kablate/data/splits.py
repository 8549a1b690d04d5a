"""Fixed-seed, class-balanced subsets and stratified splits, as index arrays."""

from __future__ import annotations

import numpy as np

from kablate.errors import DataError


def stratified_split(
    labels: np.ndarray, fraction: float, seed: int
) -> tuple[np.ndarray, np.ndarray]:
    """Split indices into (rest, held_out) with ``fraction`` of every class held out."""
    rng = np.random.default_rng(seed)
    rest, held = [], []
    for cls in np.unique(labels):
        idx = rng.permutation(np.flatnonzero(labels == cls))
        n_held = int(round(len(idx) * fraction))
        held.append(idx[:n_held])
        rest.append(idx[n_held:])
    return np.sort(np.concatenate(rest)), np.sort(np.concatenate(held))


def balanced_subset(
    labels: np.ndarray, pool: np.ndarray, n: int, seed: int, what: str
) -> tuple[np.ndarray, np.ndarray]:
    """Take ``n`` indices from ``pool`` with classes as equal as they can be.

    Returns (taken, left). Classes are filled round-robin, so a class with too few images
    gives its share to the others. ``n = 0`` takes the whole pool.
    """
    if n == 0:
        return np.sort(pool), np.array([], dtype=np.int64)
    if n > len(pool):
        raise DataError(f"`data.{what}` asks for {n} images but only {len(pool)} are available")
    rng = np.random.default_rng(seed)
    by_class = [rng.permutation(pool[labels[pool] == c]) for c in np.unique(labels[pool])]
    taken: list[int] = []
    depth = 0
    while len(taken) < n:
        for members in by_class:
            if depth < len(members) and len(taken) < n:
                taken.append(int(members[depth]))
        depth += 1
    chosen = np.sort(np.array(taken, dtype=np.int64))
    left = np.setdiff1d(pool, chosen, assume_unique=False)
    return chosen, left

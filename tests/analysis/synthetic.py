"""Synthetic per-image evidence for analysis and report tests (invented data, for tests only).

`with_predictions` gives every finished row of a synthetic trials table the predictions that
reproduce its ``val_acc`` and ``test_acc`` exactly on ``n_images`` images: the first
round(acc · n) images of a per-trial shuffle are right, the others wrong.
"""

from __future__ import annotations

import zlib

import numpy as np

from kablate.results.evidence import encode_predictions

N_IMAGES = 100
N_CLASSES = 10


def data_json(n_images: int = N_IMAGES, n_classes: int = N_CLASSES) -> dict:
    """The parts of data.json the analysis reads."""
    labels = [i % n_classes for i in range(n_images)]
    return {
        "n_classes": n_classes,
        "classes": [str(c) for c in range(n_classes)],
        "sizes": {"train": 500, "val": n_images, "test": n_images},
        "indices": {"val": list(range(n_images)), "test": list(range(n_images))},
        "labels": {"val": labels, "test": labels},
    }


def predictions_for(acc: float, key: str, n_images: int = N_IMAGES) -> str:
    labels = np.arange(n_images) % N_CLASSES
    rng = np.random.default_rng(zlib.crc32(key.encode()))
    order = rng.permutation(n_images)
    predicted = (labels + 1) % N_CLASSES
    right = order[: round(acc * n_images)]
    predicted[right] = labels[right]
    return encode_predictions(predicted)


def with_predictions(rows: list[dict], n_images: int = N_IMAGES) -> list[dict]:
    for row in rows:
        if row.get("status") == "done":
            key = f"{row['variant_id']}-s{row['seed']}"
            row["predictions"] = {
                split: predictions_for(row[f"{split}_acc"], f"{key}-{split}", n_images)
                for split in ("val", "test")
            }
    return rows

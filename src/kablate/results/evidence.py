"""Per-image evidence: the class a trial's scored weights predict for every image.

Every statistic of the report (accuracies, intervals, paired differences, the pick) is computed
from these predictions, so they travel with the trial: the worker stores them as user
attributes of its Optuna trial (a results folder need not be shared between machines), and the
export writes them to ``predictions.csv.gz``. In storage one split's predictions are a short
ASCII string: the class indices as little-endian uint16, zlib-compressed, then base64.
"""

from __future__ import annotations

import base64
import zlib

import numpy as np

SPLITS = ("val", "test")  # the splits whose predictions every trial keeps
MAX_CLASSES = 2**16  # what uint16 holds


def encode_predictions(predicted: np.ndarray) -> str:
    """Class indices → the compact string stored with the trial."""
    values = np.asarray(predicted)
    if values.size and (values.min() < 0 or values.max() >= MAX_CLASSES):
        raise ValueError(f"class indices must lie in [0, {MAX_CLASSES}), got {values.min()}…")
    raw = values.astype("<u2").tobytes()
    return base64.b64encode(zlib.compress(raw, 6)).decode("ascii")


def decode_predictions(text: str) -> np.ndarray:
    """The stored string → class indices (int64)."""
    raw = zlib.decompress(base64.b64decode(text.encode("ascii")))
    return np.frombuffer(raw, dtype="<u2").astype(np.int64)

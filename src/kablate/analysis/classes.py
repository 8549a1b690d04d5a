"""Per-class accuracy and confusion matrices of chosen variants, from the evidence.

Counts pool every compared seed: a cell of a confusion matrix counts (seed, image) pairs, so
its row sums are seeds × the images of that class.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from sklearn.metrics import confusion_matrix

from kablate.analysis.evidence import Evidence


def confusion(evidence: Evidence, name: str, n_classes: int = 0) -> np.ndarray:
    """Rows: true class; columns: predicted class (``sklearn.metrics.confusion_matrix``); at
    least ``n_classes`` of each, even where the last classes were never scored or predicted."""
    v = evidence.index(name)
    n_seeds = evidence.predicted.shape[1]
    truth = np.tile(evidence.labels, n_seeds)
    seen = int(max(evidence.labels.max(), evidence.predicted.max())) + 1
    n_classes = max(n_classes, seen)
    return confusion_matrix(truth, evidence.predicted[v].ravel(), labels=range(n_classes))


def per_class_accuracy(
    evidence: Evidence, names: list[str], classes: tuple[str, ...]
) -> pd.DataFrame:
    """One row per class: its image count and each named variant's accuracy on it (the
    diagonal of the confusion matrix over its row sum)."""
    out = pd.DataFrame({"class": list(classes)})
    counts = np.bincount(evidence.labels, minlength=len(classes))[: len(classes)]
    out["n_images"] = counts
    for name in names:
        m = confusion(evidence, name, len(classes))[: len(classes), : len(classes)]
        with np.errstate(invalid="ignore", divide="ignore"):
            out[name] = np.diag(m) / m.sum(axis=1)
    return out

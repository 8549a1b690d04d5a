"""Per-image evidence: which validation (or test) images each trial classified correctly.

Built from the predictions every trial stores (`kablate.results.evidence`) and the labels in
``data.json``, on the seeds every compared variant has finished, so that every variant is
scored on the same (seed, image) pairs and differences are paired on both.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from kablate.errors import KablateError
from kablate.lifecycle import DONE
from kablate.results.data_record import DataRecord
from kablate.results.evidence import decode_predictions


@dataclass(frozen=True)
class Evidence:
    """Correctness of every scored validation image, on seeds every variant has finished.

    ``correct[v, s, i]`` is whether variant ``names[v]`` with seed ``seeds[s]`` classified
    validation image ``i`` correctly.
    """

    names: tuple[str, ...]
    seeds: tuple[int, ...]
    correct: np.ndarray  # (V, S, I) bool
    predicted: np.ndarray  # (V, S, I) int: the predicted classes
    labels: np.ndarray  # (I,) int

    @property
    def n_images(self) -> int:
        return int(self.correct.shape[2])

    @property
    def n_correct(self) -> np.ndarray:
        """Correct predictions per variant, summed over seeds and images (integers: ties are
        decided on these, never on floats)."""
        return self.correct.sum(axis=(1, 2)).astype(np.int64)

    @property
    def accuracy(self) -> np.ndarray:
        s, i = self.correct.shape[1:]
        return self.n_correct / (s * i)

    def index(self, name: str) -> int:
        return self.names.index(name)

    def without_seed(self, seed: int) -> Evidence:
        keep = [k for k, s in enumerate(self.seeds) if s != seed]
        return Evidence(
            self.names,
            tuple(self.seeds[k] for k in keep),
            self.correct[:, keep],
            self.predicted[:, keep],
            self.labels,
        )


def gather_evidence(
    trials: pd.DataFrame, data: DataRecord, seeds: list[int] | None, split: str = "val"
) -> Evidence | None:
    """The evidence of the variants that finished every one of the compared seeds.

    Args:
        trials: `analysis.tables.trial_frame` rows, with their ``predictions``.
        data: the data record (``labels`` of every scored split).
        seeds: the seeds to compare on (None: those the finished variants share).

    Returns:
        None when no variant has a finished trial.

    Raises:
        KablateError: a finished trial has no stored predictions (a results folder written
            before predictions were kept), or its predictions do not match the split's size.
    """
    done = trials[trials["status"] == DONE]
    if done.empty:
        return None
    if data.labels is None:
        raise KablateError(
            "data.json lists no labels: this results folder was written before kablate kept "
            "per-image predictions; rerun the sweep into a new results folder"
        )
    if seeds is None:
        sets = [set(g["seed"].astype(int)) for _, g in done.groupby("variant_id")]
        seeds = sorted(set.intersection(*sets))
    labels = np.asarray(data.labels[split], dtype=np.int64)
    names, correct, predicted = [], [], []
    for name, mine in done.groupby("variant", sort=False):
        by_seed = {int(r.seed): r.predictions for r in mine.itertuples()}
        if not seeds or not all(s in by_seed for s in seeds):
            continue
        rows = []
        for s in seeds:
            encoded = (by_seed[s] or {}).get(split)
            if not encoded:
                raise KablateError(
                    f"trial {name} seed {s} has no stored {split} predictions; it was trained "
                    "by an older kablate: rerun the sweep into a new results folder"
                )
            pred = decode_predictions(encoded)
            if len(pred) != len(labels):
                raise KablateError(
                    f"trial {name} seed {s} predicted {len(pred)} {split} images, but "
                    f"data.json lists {len(labels)}"
                )
            rows.append(pred)
        names.append(str(name))
        predicted.append(np.stack(rows))
        correct.append(np.stack(rows) == labels[None, :])
    if not names:
        return None
    return Evidence(tuple(names), tuple(seeds), np.stack(correct), np.stack(predicted), labels)

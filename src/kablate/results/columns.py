"""The columns of a results folder's tables: the contract every reader may rely on.

Columns may be added; none may be removed or renamed (DEVELOPERS.md, "The results contract").
"""

from __future__ import annotations

# trials.csv: one row per (variant, seed) of the current sweep, whatever its status
TRIAL_COLUMNS = (
    "variant",
    "variant_id",
    "seed",
    "status",
    "val_acc",
    "test_acc",
    "score_epoch",
    "best_epoch",
    "params",
    "macs",
    "rf",
    "train_seconds",
    "samples_per_second",
    "threads",
    "worker",
    "trial",
    "n_attempts",
    "retired_after",  # racing: the seed after which the variant was retired (trials/race.py)
)
# curves.csv: one row per (variant, seed, epoch)
CURVE_COLUMNS = ("variant", "seed", "epoch", "train_loss", "val_loss", "val_acc", "seconds")
# predictions.csv.gz: one row per (finished trial, scored image); ``split`` is val or test and
# ``index`` is the image's index in its source, as listed under ``indices`` in data.json
PREDICTION_COLUMNS = ("variant", "seed", "split", "index", "label", "predicted")

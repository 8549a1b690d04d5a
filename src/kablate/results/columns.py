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
    # why a retired trial was not run: racing's (dominated, futile, inferior), or stopped
    # (successive halving stopped its variant on the seed ``retired_after``: trials/halving.py)
    "retired_why",
)
# curves.csv: one row per (variant, seed, epoch)
CURVE_COLUMNS = ("variant", "seed", "epoch", "train_loss", "val_loss", "val_acc", "seconds")
# predictions.csv.gz: one row per (finished trial, scored image); ``split`` is val or test and
# ``index`` is the image's index in its source, as listed under ``indices`` in data.json
PREDICTION_COLUMNS = ("variant", "seed", "split", "index", "label", "predicted")
# variants.csv after racing (analysis/race.py fills them from each variant's race entry, whose
# key is the value): the seed after which racing retired a variant, why (dominated, futile or
# inferior), the variant it was compared with, their difference and its one-sided 95% upper
# bound (fractions), the Holm-adjusted p-value
RETIRED_COLUMNS = {
    "retired_after": "seed",
    "retired_why": "why",
    "retired_by": "by_name",
    "retired_diff": "diff",
    "retired_bound": "upper",
    "retired_p_holm": "p_holm",
}
# variants.csv after successive halving (analysis/halving.py fills them): how many of a
# variant's trials were stopped early, the epoch of the latest stop (from 1) and the mean of
# those trials' last validation accuracy
STOPPED_COLUMNS = ("n_stopped", "stopped_epoch", "stopped_val_acc")
# variants.csv: one row per variant (report/compose.py writes it); its front_<cost> columns are
# those of spec.costs.COSTS (tests/results/test_columns.py checks it)
VARIANT_COLUMNS = (
    "variant",
    "variant_id",
    "n_seeds",
    "n_planned",
    "n_missing",
    "n_diverged",
    "n_held_back",
    "val_acc_mean",
    "val_acc_std",
    "val_acc_se",
    "val_acc_ci_low",
    "val_acc_ci_high",
    "test_acc_n",
    "test_acc_mean",
    "test_acc_std",
    "test_acc_ci_low",
    "test_acc_ci_high",
    "params",
    "macs",
    "flops",
    "rf",
    "act_mem_bytes",
    "infer_mem_bytes",
    "weight_bytes_fp32",
    "weight_bytes_int8",
    "latency_ms",
    "ort_latency_ms",
    "train_seconds_mean",
    "n_correct",
    "n_scored",
    "diff",
    "diff_ci_low",
    "diff_ci_high",
    "diff_lower_bound",
    "p_value",
    "p_holm",
    "noninferior",
    "cost_ratio",
    "pick_share",
    "flags",
    "front_macs",
    "front_params",
    "front_latency",
    "front_memory",
    "front_ort_latency",
    "front_all",
    "recommended",
    *RETIRED_COLUMNS,
    *STOPPED_COLUMNS,
    "plan",
)

"""The names of the files and folders of a results folder, ``results/<sweep name>/``.

Every module that writes or reads one of them takes its name from here. What each holds is
stated in DEVELOPERS.md ("The results contract"); the columns are in `columns.py`.
"""

from __future__ import annotations

from pathlib import Path

SWEEP_FILE = "sweep.json"  # the resolved sweep, where it ran, how (trials/runner.py)
PLAN_FILE = "plan.json"  # the variants with their costs, the seeds, the baseline
DATA_FILE = "data.json"  # the data record: source, sizes, split indices, scored labels
TRIALS_FILE = "trials.csv"  # one row per (variant, seed)
CURVES_FILE = "curves.csv"  # one row per (variant, seed, epoch)
PREDICTIONS_FILE = "predictions.csv.gz"  # one row per (finished trial, scored image)
VARIANTS_FILE = "variants.csv"  # one row per variant, written by the report
VARIANTS_JSON = "variants.json"  # the same, as JSON: what `kablate export` reads
TRIALS_JSON = "trials.json"
RUN_LOG = "run.log"
SEARCH_FILE = "search.json"  # a [search] sweep's proposals and finalists (trials/search_run.py)
JOURNAL = "study.journal"  # the default storage (trials/store.py)
LOCKS = "locks"  # per-trial liveness locks of a local storage (trials/liveness.py)
REPORT_DIR = "report"  # the model card and plots, unless `kablate report --out DIR`
CARD_FILE = "model_card.md"
TRIALS_DIR = "trials"  # one folder per job: its checkpoint and record
CHECKPOINT = "checkpoint.pt"  # the trial's last checkpoint (train/checkpoint.py), kept when it ends
RECORD_FILE = "record.json"  # the trial's record (train/record.py), once it ended


def trial_dir(results_dir: Path, key: str) -> Path:
    """The folder of one job (its key, `lifecycle.JobKey`): stable across reruns."""
    return results_dir / TRIALS_DIR / str(key)


def checkpoint_path(results_dir: Path, key: str) -> Path:
    """Where the trial of job ``key`` keeps its checkpoint."""
    return trial_dir(results_dir, key) / CHECKPOINT

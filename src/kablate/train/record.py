"""What one trial leaves behind: its learning curve and its final numbers."""

from __future__ import annotations

from dataclasses import asdict, dataclass, field, fields


@dataclass
class EpochRecord:
    epoch: int
    train_loss: float
    val_loss: float
    val_acc: float
    seconds: float


@dataclass
class TrialRecord:
    status: str = "done"  # done | diverged | stopped
    curve: list[EpochRecord] = field(default_factory=list)
    # The score: validation and test accuracy of the scored weights (the last epoch's, or the
    # epoch chosen on the early-stopping fold), and the class each image got from them.
    val_acc: float = float("nan")
    test_acc: float = float("nan")
    score_epoch: int = -1  # whose weights gave val_acc, test_acc and the predictions
    predictions: dict[str, str] = field(default_factory=dict)  # split → evidence.encode_predictions
    # Diagnostics, never the score: the highest per-epoch validation accuracy and its epoch
    # (on the early-stopping fold, when there is one).
    best_val_acc: float = float("nan")
    best_epoch: int = -1
    train_seconds: float = 0.0
    samples_per_second: float = 0.0  # training samples per second of wall time, validation aside
    threads: int = 1
    steps: int = 0
    note: str = ""

    def to_dict(self) -> dict:
        return asdict(self)

    @classmethod
    def from_dict(cls, raw: dict) -> TrialRecord:
        curve = [EpochRecord(**row) for row in raw.get("curve", [])]
        known = {f.name for f in fields(cls)}
        return cls(**{k: v for k, v in raw.items() if k in known and k != "curve"}, curve=curve)


def shown_epoch(epoch: int | None) -> int | None:
    """The number a user reads for an epoch of the trainer.

    The trainer and its checkpoints count epochs from 0; everything a user reads counts from
    1 (`trials.csv`'s `score_epoch` and `best_epoch`, `curves.csv`, the learning-curve plots,
    the log), so that "epoch 1" is the first one everywhere. No epoch (-1 or None) is None.
    """
    return None if epoch is None or epoch < 0 else epoch + 1

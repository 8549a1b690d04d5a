"""What one trial leaves behind: its learning curve and its final numbers."""

from __future__ import annotations

from dataclasses import asdict, dataclass, field


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
    best_val_acc: float = float("nan")
    best_epoch: int = -1
    test_acc: float = float("nan")
    test_epoch: int = -1  # whose weights gave test_acc: the best-validation or the last epoch
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
        return cls(**{**raw, "curve": curve})

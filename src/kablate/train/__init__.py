"""Training: one trial of one variant with one seed."""

from kablate.train.loop import TrialInterrupted, train_trial
from kablate.train.record import EpochRecord, TrialRecord

__all__ = ["EpochRecord", "TrialInterrupted", "TrialRecord", "train_trial"]

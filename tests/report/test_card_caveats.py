"""The card warns when the seed standard error is finer than one validation image."""

from __future__ import annotations

import math
from types import SimpleNamespace

import pandas as pd

from kablate.report.card import _resolution_caveat


def _analysis(best_se: float, best_acc: float = 0.99):
    variants = pd.DataFrame({"variant": ["a", "b"], "val_acc_mean": [best_acc, 0.98]})
    return SimpleNamespace(selection=SimpleNamespace(best="a", best_se=best_se), variants=variants)


def test_warns_when_seed_se_is_below_one_validation_image():
    lines = _resolution_caveat(_analysis(best_se=0.001), val_size=300)
    assert len(lines) == 1
    text = lines[0]
    assert "0.10 pp" in text and "0.33 pp of 300" in text
    # binomial standard error sqrt(p(1-p)/n) of an accuracy (common practice)
    assert f"{100 * math.sqrt(0.99 * 0.01 / 300):.2f} pp" in text


def test_silent_when_seed_se_covers_a_validation_image_or_is_undefined():
    assert _resolution_caveat(_analysis(best_se=0.01), val_size=300) == []
    assert _resolution_caveat(_analysis(best_se=float("nan")), val_size=300) == []

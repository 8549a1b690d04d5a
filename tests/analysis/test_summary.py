"""The analysis entry point: the selection settings it runs with, the held-out test accuracy it
reports beside validation, and the resolution it says the sweep reached.

`analyze`'s tables, fronts and grids are checked in test_tables.py and test_decide.py; these
are the rest of summary.py."""

from __future__ import annotations

import numpy as np
import pytest

from kablate.analysis.power import z_sum
from kablate.analysis.summary import analyze, observed_resolution, pick_settings
from kablate.errors import UsageError
from kablate.spec.schema import PickSpec
from tests.analysis.synthetic import VAL, data_json, plan, rows, with_predictions

COMPLETE = dict(VAL, v2=[0.93, 0.94, 0.95])  # every started variant has all three seeds


def test_pick_settings_are_the_command_lines_else_the_sweeps_else_the_defaults():
    assert pick_settings({}) == PickSpec()
    meta = {"resolved": {"pick": {"margin": 2.0, "cost": "params"}}}
    assert pick_settings(meta) == PickSpec(margin=2.0, cost="params")
    assert pick_settings(meta, cost="macs", margin=None) == PickSpec(margin=2.0, cost="macs")
    with pytest.raises(UsageError, match="margin"):
        pick_settings({"resolved": {"pick": {"margin": 80.0}}})  # beyond 50 pp


def test_test_accuracy_is_reported_from_the_test_evidence_and_never_picks():
    a = analyze(with_predictions(rows(COMPLETE)), [], plan(), [], data_json(), PickSpec())
    v = a.variants.set_index("variant")
    # synthetic test accuracy: validation's minus 0.01 on every seed, 100 images each
    for name, vid in (("base", "v0"), ("cheap", "v1"), ("big", "v2")):
        expected = np.mean(COMPLETE[vid]) - 0.01
        assert v.loc[name, "test_acc_mean"] == pytest.approx(expected, abs=1e-12)
        assert v.loc[name, "test_acc_ci_low"] <= expected <= v.loc[name, "test_acc_ci_high"]
    assert np.isnan(v.loc["never", "test_acc_mean"])
    # moving every test prediction changes no part of the decision
    worse = [dict(r, test_acc=0.1) if r["status"] == "done" else r for r in rows(COMPLETE)]
    b = analyze(with_predictions(worse), [], plan(), [], data_json(), PickSpec())
    assert b.recommended == a.recommended
    np.testing.assert_array_equal(b.variants["val_acc_mean"], a.variants["val_acc_mean"])
    assert b.variants["test_acc_mean"].iloc[0] == pytest.approx(0.1)


def test_the_resolution_reached_is_z_times_the_median_standard_error():
    every = dict(COMPLETE, v3=[0.5, 0.7, 0.6])  # three contrasts: their median is not the mean
    a = analyze(with_predictions(rows(every)), [], plan(), [], data_json(), PickSpec())
    ses = [c.se for c in a.decision.contrasts.values()]
    assert len(ses) == 3 and np.median(ses) != pytest.approx(np.mean(ses))
    r = observed_resolution(a.evidence, a.decision)
    assert r.observed and r.n_images == 100
    assert r.smallest == pytest.approx(z_sum() * float(np.median(ses)))
    n_pairs = 3 * 100  # seeds × images
    shares = [c.n_discordant / n_pairs for c in a.decision.contrasts.values()]
    assert r.disagreement == pytest.approx(np.mean(shares)) and 0 < r.disagreement < 1

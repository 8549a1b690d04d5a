"""A rerun must be the same sweep: the fingerprint, the listed differences, and the check
that records a sweep's definition once and refuses a changed network, recipe or data."""

from __future__ import annotations

import hashlib
import json
from dataclasses import replace

import optuna
import pytest

from kablate.errors import UsageError
from kablate.spec import load_sweep
from kablate.trials.meta import DEFINITION_ATTR, check_definition, fingerprint, flat_diff


def test_the_fingerprint_is_the_sha1_of_the_sorted_json_and_ignores_key_order():
    value = {"b": [1, 2], "a": {"y": 1.5, "x": "s"}}
    canonical = '{"a": {"x": "s", "y": 1.5}, "b": [1, 2]}'  # json.dumps, sort_keys=True
    assert fingerprint(value) == hashlib.sha1(canonical.encode()).hexdigest()[:12]
    assert fingerprint({"a": {"x": "s", "y": 1.5}, "b": [1, 2]}) == fingerprint(value)
    assert fingerprint({**value, "b": [2, 1]}) != fingerprint(value)


def test_flat_diff_names_each_changed_leaf_with_its_dotted_path():
    old = {"recipe": {"epochs": 2, "lr": 0.05}, "data": {"source": "digits"}}
    new = {"recipe": {"epochs": 3, "lr": 0.05}, "data": {"source": "digits", "val_size": 50}}
    assert flat_diff(old, new) == ["data.val_size: null → 50", "recipe.epochs: 2 → 3"]
    assert flat_diff(old, json.loads(json.dumps(old))) == []


def test_a_rerun_may_add_seeds_but_not_change_the_recipe(tiny_sweep):
    sweep = load_sweep(tiny_sweep)
    study = optuna.create_study()
    check_definition(study, sweep)  # the first start records it
    assert study.user_attrs[DEFINITION_ATTR]["recipe"]["epochs"] == 2
    check_definition(study, replace(sweep, seeds=(0, 1, 2)))  # more seeds: the same sweep
    raw = json.loads(json.dumps(sweep.raw))
    raw["recipe"]["epochs"] = 3
    with pytest.raises(UsageError) as caught:
        check_definition(study, replace(sweep, raw=raw))
    assert "recipe.epochs: 2 → 3" in str(caught.value)
    assert "give the sweep a new [sweep].name" in str(caught.value)
    assert study.user_attrs[DEFINITION_ATTR]["recipe"]["epochs"] == 2  # left as it started

"""A results folder read back: each file kablate wrote is refused, with its path and how to
write it again, when it is missing, damaged or lacks what every reader needs."""

from __future__ import annotations

import json

import pytest

from kablate.errors import UsageError
from kablate.results.folder import PLAN_KEYS, read_json, read_records
from kablate.results.paths import PLAN_FILE, SWEEP_FILE


def write(folder, meta=None, plan=None) -> None:
    meta = {"name": "tiny"} if meta is None else meta
    plan = dict.fromkeys(PLAN_KEYS, []) if plan is None else plan
    (folder / SWEEP_FILE).write_text(json.dumps(meta), encoding="utf-8")
    (folder / PLAN_FILE).write_text(json.dumps(plan), encoding="utf-8")


def test_a_complete_folder_reads_back_its_sweep_and_plan(tmp_path):
    write(tmp_path, {"name": "tiny", "seeds": [0]})
    meta, plan = read_records(tmp_path)
    assert meta == {"name": "tiny", "seeds": [0]} and set(plan) == set(PLAN_KEYS)


def test_a_file_that_is_not_there_or_not_a_folder_is_named(tmp_path):
    with pytest.raises(UsageError, match=f"{tmp_path / SWEEP_FILE} is missing"):
        read_records(tmp_path)
    with pytest.raises(UsageError, match="is not a folder"):
        read_records(tmp_path / "nothing")


@pytest.mark.parametrize(
    ("text", "why"), [('{"name": ', "is damaged \\("), ("[1, 2]", "not a JSON object")]
)
def test_a_damaged_file_is_named_with_how_to_write_it_again(tmp_path, text, why):
    path = tmp_path / SWEEP_FILE
    path.write_text(text, encoding="utf-8")
    with pytest.raises(UsageError, match=why) as caught:
        read_json(path)
    assert str(path) in str(caught.value) and "kablate run" in str(caught.value)


def test_a_plan_without_what_every_reader_needs_is_refused_naming_the_keys(tmp_path):
    write(tmp_path, plan={"variants": []})
    with pytest.raises(UsageError, match="lacks `seeds`, `baseline`"):
        read_records(tmp_path)

"""The data record (data.json) is read back as a `DataRecord`: every key `kablate run` writes
becomes a field, and a damaged file is refused with the file and the key named."""

from __future__ import annotations

import json
from dataclasses import fields
from pathlib import Path

import pandas as pd
import pytest

from kablate.analysis.evidence import gather_evidence
from kablate.data.prepare import prepare_data
from kablate.errors import KablateError, UsageError
from kablate.results.data_record import KINDS, OPTIONAL, DataRecord
from kablate.results.folder import ResultsFolder
from kablate.results.paths import DATA_FILE
from kablate.spec.schema import DataSpec


@pytest.fixture(scope="module")
def manifest() -> dict:
    """What `kablate run` writes to data.json for a small digits sweep, through JSON."""
    prepared = prepare_data(DataSpec(train_size=50, val_size=20, test_size=20, stop_size=10))
    return json.loads(json.dumps(prepared.manifest()))


class Folder(ResultsFolder):
    """A results folder without storage: only its files are read here."""

    def rows(self):
        raise NotImplementedError

    def race(self):
        raise NotImplementedError

    def halving(self):
        raise NotImplementedError


def folder_with(tmp_path: Path, content: dict) -> Folder:
    (tmp_path / DATA_FILE).write_text(json.dumps(content), encoding="utf-8")
    return Folder(tmp_path, {"name": "x"}, {"variants": [], "seeds": [], "baseline": "v0"})


def test_every_key_the_run_writes_is_a_field_of_the_record_and_reads_back_unchanged(manifest):
    assert set(manifest) == {f.name for f in fields(DataRecord)} == set(KINDS)
    record = DataRecord.from_dict(manifest, DATA_FILE)
    for key, value in manifest.items():
        got = getattr(record, key)
        assert (list(got) if isinstance(got, tuple) else got) == value, key
    assert record.labels["val"] == manifest["labels"]["val"] and len(record.labels["val"]) == 20
    assert record.n_classes == len(record.classes) == 10  # the UCI digits: ten classes


def test_the_results_folder_returns_the_record(tmp_path, manifest):
    record = folder_with(tmp_path, manifest).data()
    assert isinstance(record, DataRecord)
    assert record == DataRecord.from_dict(manifest, DATA_FILE)


@pytest.mark.parametrize("key", [k for k in KINDS if k not in OPTIONAL])
def test_a_missing_key_is_refused_naming_the_file_and_the_key(tmp_path, manifest, key):
    damaged = {k: v for k, v in manifest.items() if k != key}
    with pytest.raises(UsageError) as caught:
        folder_with(tmp_path, damaged).data()
    assert str(tmp_path / DATA_FILE) in str(caught.value)
    assert f"lacks `{key}`" in str(caught.value)


@pytest.mark.parametrize(("key", "value"), [("sizes", [1, 2]), ("n_classes", "10"), ("labels", 3)])
def test_a_value_of_the_wrong_kind_is_refused_naming_the_key(tmp_path, manifest, key, value):
    with pytest.raises(UsageError, match=f"`{key}` should be a JSON"):
        folder_with(tmp_path, {**manifest, key: value}).data()


def test_a_record_from_before_predictions_has_numbered_classes_and_no_labels(manifest):
    old = {k: v for k, v in manifest.items() if k not in OPTIONAL}
    record = DataRecord.from_dict(old, DATA_FILE)
    assert record.classes == tuple(str(c) for c in range(10)) and record.labels is None
    done = pd.DataFrame([{"status": "done", "variant_id": "v0", "variant": "a", "seed": 0}])
    with pytest.raises(KablateError, match="data.json lists no labels"):
        gather_evidence(done, record, None)

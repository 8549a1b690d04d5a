"""The walking skeleton end to end: sweep file → trials → tables → report."""

from __future__ import annotations

import csv
import hashlib
import json

import pytest

from kablate.costs.catalog import build_catalog
from kablate.errors import UsageError
from kablate.report import write_report
from kablate.spec import load_sweep
from kablate.trials import RunOptions, open_results, run_sweep
from kablate.trials.runner import write_manifest

CONTRACT = (
    "variant",
    "seed",
    "status",
    "val_acc",
    "test_acc",
    "params",
    "macs",
    "rf",
    "train_seconds",
)


@pytest.mark.slow
def test_run_writes_the_results_contract_and_a_rerun_trains_nothing(tiny_sweep, tmp_path):
    opts = RunOptions(results_root=tmp_path / "results", workers=1, show_progress=False)
    first = run_sweep(tiny_sweep, opts)
    assert first.n_jobs == 4 and first.n_ran == 4
    assert first.counts == {"done": 4}
    folder = first.results_dir
    with (folder / "trials.csv").open() as fh:
        rows = list(csv.DictReader(fh))
    assert len(rows) == 4
    assert set(CONTRACT) <= set(rows[0])
    assert {(r["variant"], r["seed"]) for r in rows} == {
        ("all-3", "0"),
        ("all-3", "1"),
        ("stem-5", "0"),
        ("stem-5", "1"),
    }
    assert all(0.0 <= float(r["val_acc"]) <= 1.0 for r in rows)
    # One epoch numbering: curves.csv counts the 2 epochs from 1, and trials.csv's best_epoch
    # is the first epoch of the curve with the highest validation accuracy.
    with (folder / "curves.csv").open() as fh:
        curves = list(csv.DictReader(fh))
    for r in rows:
        mine = [c for c in curves if (c["variant"], c["seed"]) == (r["variant"], r["seed"])]
        assert [c["epoch"] for c in mine] == ["1", "2"]
        best = max(mine, key=lambda c: (float(c["val_acc"]), -int(c["epoch"])))
        assert r["best_epoch"] == best["epoch"] and r["score_epoch"] == "2"

    card = write_report(open_results(folder))
    assert card == folder / "report" / "model_card.md"
    assert list((folder / "report").glob("*.png"))
    with (folder / "variants.csv").open() as fh:
        variants = list(csv.DictReader(fh))
    assert [v["variant"] for v in variants] == ["all-3", "stem-5"]
    assert all(v["n_seeds"] == "2" for v in variants)

    again = run_sweep(tiny_sweep, opts)
    assert again.n_ran == 0 and again.n_new == 0
    printed: list[str] = []
    opts.dry_run, opts.echo = True, printed.append
    dry = run_sweep(tiny_sweep, opts)
    assert printed == [
        f"every one of the 4 trials of sweep tiny has already finished, in {folder}: "
        f"`kablate run` would train nothing; `kablate report {folder}` rebuilds the report"
    ]
    assert dry.counts == {"done": 4}


@pytest.mark.slow
def test_changed_recipe_is_refused_and_a_new_seed_runs_alone(tiny_sweep, tmp_path):
    opts = RunOptions(results_root=tmp_path / "results", workers=1, show_progress=False)
    run_sweep(tiny_sweep, opts)
    text = tiny_sweep.read_text()
    tiny_sweep.write_text(
        text.replace(
            'from = "configs/tiny-recipe.toml"', 'from = "configs/tiny-recipe.toml"\nlr = 0.1'
        )
    )
    with pytest.raises(UsageError, match=r"recipe.lr: 0.05 → 0.1"):
        run_sweep(tiny_sweep, opts)
    tiny_sweep.write_text(text.replace("seeds = [0, 1]", "seeds = [0, 1, 2]"))
    more = run_sweep(tiny_sweep, opts)
    assert more.n_ran == 2 and more.counts == {"done": 6}


def test_the_manifest_identifies_the_sweep_file_and_the_resolved_sweep(tiny_sweep, tmp_path):
    def manifest(path):
        out = tmp_path / path.stem
        write_manifest(out, build_catalog(load_sweep(path)), None, RunOptions(), (1, 1))
        return json.loads((out / "sweep.json").read_text())

    first = manifest(tiny_sweep)
    assert first["file_sha256"] == hashlib.sha256(tiny_sweep.read_bytes()).hexdigest()
    # A new seed changes the sweep's fingerprint but not the definition's (network, recipe,
    # data), which is what a rerun is checked against.
    more = tiny_sweep.with_name("more.toml")
    more.write_text(tiny_sweep.read_text().replace("seeds = [0, 1]", "seeds = [0, 1, 2]"))
    second = manifest(more)
    assert second["fingerprint"] == first["fingerprint"]
    assert second["sweep_fingerprint"] != first["sweep_fingerprint"]
    assert second["file_sha256"] != first["file_sha256"]

"""Where `kablate report` writes: `--out` leaves the results folder as it is, so a read-only
results folder can still be reported on; a folder that cannot be written is one line, exit 2."""

from __future__ import annotations

import subprocess
from pathlib import Path

import pytest
from click.testing import CliRunner

from kablate.cli import main
from kablate.trials import RunOptions, run_sweep
from tests.conftest import TINY_SWEEP, the_error_line, write_sweep


@pytest.fixture(scope="module")
def results(tmp_path_factory) -> Path:
    """A finished one-seed, one-epoch tiny sweep; no report written."""
    root = tmp_path_factory.mktemp("folders")
    body = TINY_SWEEP.replace("seeds = [0, 1]", "seeds = [0]")
    body = body.replace(
        'from = "configs/tiny-recipe.toml"', 'from = "configs/tiny-recipe.toml"\nepochs = 1'
    )
    sweep = write_sweep(root, body)
    opts = RunOptions(results_root=root / "results", workers=1, show_progress=False)
    summary = run_sweep(sweep, opts)
    assert summary.counts == {"done": 2}
    return summary.results_dir


def snapshot(folder: Path) -> dict[str, tuple[bytes, int]]:
    """Every file under ``folder`` with its bytes and modification time."""
    return {
        str(p.relative_to(folder)): (p.read_bytes(), p.stat().st_mtime_ns)
        for p in sorted(folder.rglob("*"))
        if p.is_file()
    }


@pytest.mark.slow
def test_report_out_writes_card_and_tables_there_and_nothing_in_the_results(results, tmp_path):
    before = snapshot(results)
    out = tmp_path / "card"
    done = CliRunner().invoke(main, ["report", str(results), "--out", str(out), "--no-erf"])
    assert done.exit_code == 0, done.output
    assert snapshot(results) == before
    for name in ("model_card.md", "trials.csv", "variants.csv", "variants.json", "curves.csv"):
        assert (out / name).stat().st_size > 0, name
    variants = (out / "variants.csv").read_text().splitlines()
    assert variants[0].startswith("variant,") and len(variants) == 3  # header + 2 variants


@pytest.mark.slow
def test_report_out_naming_a_file_is_one_line_exit_2(results, tmp_path):
    target = tmp_path / "a-file"
    target.write_text("")
    out = CliRunner().invoke(main, ["report", str(results), "--out", str(target), "--no-erf"])
    assert out.exit_code == 2
    assert the_error_line(out.output) == f"error: --out folder {target} is a file, not a folder"


@pytest.fixture
def read_only_copy(results, tmp_path):
    """``results`` bind-mounted read-only (as root, file modes alone do not stop a write)."""
    view = tmp_path / "ro"
    view.mkdir()
    mounted = subprocess.run(["mount", "--bind", str(results), str(view)], capture_output=True)
    if mounted.returncode != 0:
        pytest.skip("cannot bind-mount here: " + mounted.stderr.decode().strip())
    try:
        subprocess.run(["mount", "-o", "remount,ro,bind", str(view)], check=True)
        yield view
    finally:
        subprocess.run(["umount", str(view)], check=True)


@pytest.mark.slow
def test_a_read_only_results_folder_is_reported_with_out_and_refused_without(
    read_only_copy, tmp_path
):
    runner = CliRunner()
    refused = runner.invoke(main, ["report", str(read_only_copy), "--no-erf"])
    assert refused.exit_code == 2
    error = the_error_line(refused.output)
    assert error.startswith(f"error: results folder {read_only_copy} cannot be written")
    assert "give --out DIR" in error
    out = tmp_path / "card"
    done = runner.invoke(main, ["report", str(read_only_copy), "--out", str(out)])
    assert done.exit_code == 0, done.output
    assert (out / "model_card.md").is_file()
    status = runner.invoke(main, ["status", str(read_only_copy)])
    assert status.exit_code == 0, status.output

"""The command line as a user meets it: verbs, help, version, and clean errors."""

from __future__ import annotations

import csv
import io
import json
import shutil

from kablate import __version__
from tests.conftest import REPO, kablate


def test_help_lists_the_verbs():
    out = kablate("--help")
    assert out.returncode == 0
    for verb in ("plan", "run", "status", "report"):
        assert f"  {verb} " in out.stdout


def test_help_gives_each_verb_its_whole_first_sentence():
    from kablate.cli import main

    listing = kablate("--help").stdout.split("Commands:\n")[1]
    described: dict[str, str] = {}
    for line in listing.splitlines():
        name, _, text = line.strip().partition(" ") if line[:4].strip() else ("", "", line)
        if name:
            described[name] = text.strip()
        else:
            described[list(described)[-1]] += " " + text.strip()
    for verb in ("plan", "run", "status", "report"):
        first_sentence = " ".join(main.commands[verb].help.split("\n\n")[0].split())
        first_sentence = first_sentence.split(". ")[0].rstrip(".") + "."
        assert described[verb] == first_sentence
    assert "..." not in listing


def test_every_verb_has_help_with_an_example():
    for verb in ("plan", "run", "status", "report"):
        out = kablate(verb, "--help")
        assert out.returncode == 0, out.stderr
        assert "Example" in out.stdout and f"kablate {verb}" in out.stdout


def test_version():
    out = kablate("--version")
    assert out.returncode == 0 and __version__ in out.stdout


def test_misspelt_key_in_a_copy_of_the_quickstart_exits_2_without_traceback(tmp_path):
    copy = tmp_path / "quickstart.toml"
    shutil.copy(REPO / "sweeps" / "quickstart.toml", copy)
    text = copy.read_text()
    assert "val_size" in text
    copy.write_text(text.replace("val_size", "val_sizes", 1))
    out = kablate("plan", str(copy))
    assert out.returncode == 2
    assert "Traceback" not in out.stderr
    assert str(copy) in out.stderr
    assert "`data.val_sizes`" in out.stderr
    assert "did you mean `val_size`" in out.stderr


def test_plan_prints_every_format_for_the_quickstart():
    for fmt in ("table", "json", "csv"):
        out = kablate("plan", "sweeps/quickstart.toml", "--format", fmt)
        assert out.returncode == 0, out.stderr
        assert "all-3" in out.stdout


def test_plan_csv_ends_with_its_last_row():
    # A CSV file ends with one line break after the last record (RFC 4180, section 2).
    out = kablate("plan", "sweeps/quickstart.toml", "--format", "csv")
    assert out.returncode == 0, out.stderr
    rows = list(csv.reader(io.StringIO(out.stdout)))
    assert [] not in rows, rows[-2:]
    assert out.stdout.endswith("\n") and not out.stdout.endswith("\n\n")
    assert len(rows) == 1 + len(
        json.loads(kablate("plan", "sweeps/quickstart.toml", "--format", "json").stdout)
    )


def test_missing_results_folder_is_a_usage_error(tmp_path):
    out = kablate("status", str(tmp_path / "nothing"))
    assert out.returncode == 2 and "Traceback" not in out.stderr


def test_checkpoint_seconds_that_are_not_a_time_are_refused_with_exit_2(tiny_sweep, tmp_path):
    for bad in ("-1", "nan", "soon", ""):
        out = kablate(
            "run", str(tiny_sweep), "--checkpoint-seconds", bad, "--results", str(tmp_path)
        )
        assert out.returncode == 2, (bad, out.stderr)
        assert "--checkpoint-seconds must be a number of seconds" in out.stderr
        assert "Traceback" not in out.stderr
    assert not (tmp_path / "tiny").exists()  # refused before anything ran


def test_the_checkpoint_seconds_help_gives_the_default_the_run_uses():
    from kablate.train.checkpoint import DEFAULT_CHECKPOINT_SECONDS
    from kablate.trials.runner import RunOptions

    assert RunOptions().checkpoint_seconds == DEFAULT_CHECKPOINT_SECONDS
    help_text = " ".join(kablate("run", "--help").stdout.split())
    assert f"(default: {DEFAULT_CHECKPOINT_SECONDS:g})" in help_text

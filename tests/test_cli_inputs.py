"""Bad inputs at the command line: one line on stderr and exit code 2 (130 for Ctrl-C), never
a traceback."""

from __future__ import annotations

import csv
import io
import json
import subprocess
import sys
import textwrap

import pytest
from click.testing import CliRunner

from kablate.cli import main
from tests.conftest import REPO, TINY_SWEEP, the_error_line, write_sweep


def invoke(*args: str):
    return CliRunner().invoke(main, list(args))


def one_line_exit_2(result, *words: str) -> None:
    assert result.exit_code == 2, result.output
    error = the_error_line(result.output)
    for word in words:
        assert word in error, result.output


@pytest.mark.parametrize("damaged", ["sweep.json", "plan.json"])
def test_a_damaged_json_file_of_a_results_folder_is_named(tmp_path, damaged):
    folder = tmp_path / "results" / "tiny"
    folder.mkdir(parents=True)
    for name in ("sweep.json", "plan.json"):
        (folder / name).write_text(json.dumps({"name": "tiny", "seeds": [0]}))
    (folder / damaged).write_text('{"name": "ti')  # cut off mid-write
    for verb in ("status", "report"):
        one_line_exit_2(invoke(verb, str(folder)), f"{folder / damaged} is damaged")


@pytest.mark.parametrize(("file", "lacks"), [("sweep.json", "`name`"), ("plan.json", "`variants`")])
def test_a_results_file_without_its_keys_is_named(tmp_path, file, lacks):
    folder = tmp_path / "results" / "tiny"
    folder.mkdir(parents=True)
    whole = {"name": "tiny", "seeds": [0], "variants": [], "baseline": "v0"}
    for name in ("sweep.json", "plan.json"):
        (folder / name).write_text(json.dumps(whole))
    (folder / file).write_text(json.dumps({"seeds": [0], "baseline": "v0"}))  # valid JSON
    for verb in ("status", "report"):
        one_line_exit_2(invoke(verb, str(folder)), f"{folder / file} lacks {lacks}")


def test_results_naming_a_file_is_refused(tiny_sweep, tmp_path):
    target = tmp_path / "a-file"
    target.write_text("")
    out = invoke("run", str(tiny_sweep), "--results", str(target))
    one_line_exit_2(out, f"results folder {target / 'tiny'} cannot be written", "--results DIR")


def test_a_read_only_results_root_is_refused_before_anything_runs(tiny_sweep, tmp_path):
    root = tmp_path / "ro"
    root.mkdir()
    mounted = subprocess.run(
        ["mount", "-t", "tmpfs", "-o", "ro,size=1m", "tmpfs", str(root)], capture_output=True
    )
    if mounted.returncode != 0:
        pytest.skip("cannot mount a read-only tmpfs here: " + mounted.stderr.decode().strip())
    try:
        out = invoke("run", str(tiny_sweep), "--results", str(root))
    finally:
        subprocess.run(["umount", str(root)], check=True)
    one_line_exit_2(out, f"results folder {root / 'tiny'} cannot be written", "Read-only")


def test_a_dry_run_with_no_training_image_is_refused(tmp_path):
    body = TINY_SWEEP.replace(
        "train_size = 200\nval_size = 100\ntest_size = 100", "val_size = 1347"
    )
    sweep = write_sweep(tmp_path, body)
    out = invoke("run", str(sweep), "--dry-run", "--results", str(tmp_path / "r"))
    one_line_exit_2(out, "leaves no training image", "`data.val_size`")
    one_line_exit_2(invoke("plan", str(sweep)), "leaves no training image")
    assert not (tmp_path / "r").exists()


def test_a_long_sweep_name_is_refused_before_a_folder_is_named(tmp_path):
    sweep = write_sweep(tmp_path, TINY_SWEEP.replace('name = "tiny"', f'name = "{"n" * 300}"'))
    out = invoke("run", str(sweep), "--results", str(tmp_path / "r"))
    one_line_exit_2(out, "`sweep.name` must be at most 100 characters")
    assert not (tmp_path / "r").exists()


def test_deep_nesting_is_one_line(tmp_path):
    path = tmp_path / "deep.toml"
    path.write_text('[sweep]\nname = "x"\n[data]\nx = ' + "[" * 5000 + "]" * 5000 + "\n")
    one_line_exit_2(invoke("plan", str(path)), "nests arrays or tables too deeply")


def test_plan_latency_on_a_batch_that_cannot_fit_is_refused_before_allocating(tmp_path):
    body = TINY_SWEEP.replace(
        'from = "configs/tiny-recipe.toml"', 'from = "configs/tiny-recipe.toml"\nbatch_size = 65536'
    ).replace(
        'from = "configs/tiny-net.toml"', 'from = "configs/tiny-net.toml"\nstem.out_ch = 4096'
    )
    sweep = write_sweep(tmp_path, body)
    # 65,536 × 4,096 channels × 8 × 8 pixels × 4 bytes is 64 GiB for the stem's output alone
    out = invoke("plan", str(sweep), "--latency")
    one_line_exit_2(out, "one training step of variant", "GiB available (MemAvailable)")


# Ctrl-C while a module is being imported, made deterministic: an import hook sends SIGINT to
# its own process when the named module is first looked for.
INTERRUPT_AT = """
import os, runpy, signal, sys

class Interrupt:
    def find_spec(self, name, path=None, target=None):
        if name == {module!r}:
            sys.meta_path.remove(self)
            os.kill(os.getpid(), signal.SIGINT)
        return None

sys.meta_path.insert(0, Interrupt())
sys.argv = ["kablate", *{args!r}]
{run}
"""
# ``python -m kablate``, and the installed `kablate` script (its entry point in pyproject.toml)
BY_MODULE = 'runpy.run_module("kablate", run_name="__main__")'
BY_SCRIPT = (
    "from importlib.metadata import entry_points; "
    'entry_points(group="console_scripts")["kablate"].load()()'
)


@pytest.mark.parametrize("run", [BY_MODULE, BY_SCRIPT], ids=["module", "script"])
@pytest.mark.parametrize(
    ("module", "args", "said"),
    [
        ("click", ["plan", "sweeps/quickstart.toml"], "interrupted (Ctrl-C)\n"),
        (
            "torch",
            ["plan", "sweeps/quickstart.toml"],
            "interrupted (Ctrl-C) while starting; nothing was written\n",
        ),
        (
            "optuna",
            ["status", "results/none"],
            "interrupted (Ctrl-C) while starting; nothing was written\n",
        ),
    ],
)
def test_ctrl_c_while_importing_exits_130_in_one_line(module, args, said, run):
    code = textwrap.dedent(INTERRUPT_AT.format(module=module, args=args, run=run))
    out = subprocess.run(
        [sys.executable, "-c", code], cwd=REPO, capture_output=True, text=True, timeout=300
    )
    assert out.returncode == 130, out.stderr
    assert out.stderr == said


def test_plan_takes_several_sweep_files_one_table_each():
    files = ("sweeps/quickstart.toml", "sweeps/stem-size.toml")
    alone = [CliRunner().invoke(main, ["plan", str(REPO / f)]) for f in files]
    both = CliRunner().invoke(main, ["plan", *(str(REPO / f) for f in files)])
    assert both.exit_code == 0, both.output
    tables = [f"{REPO / f}\n{out.stdout}" for f, out in zip(files, alone, strict=True)]
    assert both.stdout == "\n".join(tables)
    assert tables[0].splitlines()[1].startswith("sweep quickstart: 5 variants")
    assert tables[1].splitlines()[1].startswith("sweep stem-size: 6 variants")


def test_plan_of_several_files_prints_the_others_when_one_is_refused(tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text('[sweep]\nname = "bad"\n')
    good = REPO / "sweeps" / "quickstart.toml"
    out = CliRunner().invoke(main, ["plan", str(good), str(bad), "--format", "json"])
    assert out.exit_code == 2
    refused, warned = out.stderr.splitlines()  # the error, then the good file's warning
    assert refused == (
        f"error: {bad}: `plan` is missing: give at least one [[plan]], [[grid]] or a [search] space"
    )
    assert warned.startswith(f"{good}: warning: body-5: its receptive field is already 28x28")
    first, second = json.loads(out.stdout)
    alone = json.loads(CliRunner().invoke(main, ["plan", str(good), "--format", "json"]).stdout)
    assert first == {"file": str(good), "sweep": "quickstart", "variants": alone}
    assert second == {"file": str(bad), "error": refused.removeprefix("error: ")}
    rows = list(
        csv.DictReader(io.StringIO(invoke("plan", str(good), str(bad), "--format", "csv").stdout))
    )
    assert [(r["file"], r["name"]) for r in rows] == [(str(good), v["name"]) for v in alone]

"""`kablate report` after a tiny real run: the card, its links, its tables, determinism."""

from __future__ import annotations

import csv
import json
import re
import shutil
from pathlib import Path

import numpy as np
import pytest
import torch
from click.testing import CliRunner
from torch.utils.flop_counter import FlopCounterMode

from kablate.analysis.summary import pick_settings
from kablate.cli import main
from kablate.errors import SweepError
from kablate.nets.build import build_network
from kablate.nets.handoff import build_handoff
from kablate.report import write_report
from kablate.results.checkpoint import scored_state
from kablate.results.columns import PREDICTION_COLUMNS
from kablate.results.paths import CHECKPOINT
from kablate.spec import load_sweep
from kablate.trials import RunOptions, open_results, run_sweep
from tests.conftest import TINY_SWEEP, write_sweep


@pytest.fixture(scope="module")
def results(tmp_path_factory) -> Path:
    """A finished tiny sweep (2 plans × 2 seeds, 2 epochs) with its report written."""
    root = tmp_path_factory.mktemp("report")
    sweep = write_sweep(root, TINY_SWEEP)
    summary = run_sweep(
        sweep, RunOptions(results_root=root / "results", workers=1, show_progress=False)
    )
    assert summary.counts == {"done": 4}
    write_report(open_results(summary.results_dir))
    return summary.results_dir


def card_text(folder: Path) -> str:
    return (folder / "report" / "model_card.md").read_text()


@pytest.mark.slow
def test_card_links_images_that_exist_and_holds_the_table_and_recommendation(results):
    text = card_text(results)
    links = re.findall(r"\]\(([^)]+)\)", text)
    assert any(link.endswith(".png") for link in links)
    for link in links:
        assert not link.startswith("/"), "links must be relative"
        assert (results / "report" / link).is_file(), link
    for heading in (
        "### Model details",
        "### Intended use",
        "### Metrics",
        "### Training data",
        "### Evaluation data",
        "### Quantitative analyses",
        "### Caveats and recommendations",
    ):
        assert heading in text  # Mitchell et al. 2019's section headings
    assert "#### Variants against the baseline" in text
    assert "| all-3" in text and "| stem-5" in text
    rows = list(csv.DictReader((results / "variants.csv").open()))
    rec = [r["variant"] for r in rows if r["recommended"] == "True"]
    assert len(rec) == 1
    verdict = (
        f"**Recommended kernel plan: {rec[0]}**"
        if rec[0] != "all-3"
        else ("**Keep the baseline all-3**")
    )
    assert verdict in text
    assert "non-inferiority with a 1.00 pp margin" in text
    assert "#### Per-class validation accuracy" in text and "Holm" in text
    assert "safety-related" in text
    assert "fingerprint `" in text and "Command: `" in text and "thread(s)" in text
    assert "SHA-256 `" in text and "resolved-sweep fingerprint `" in text
    # The effective receptive field was computed from the trials' checkpoints.
    erf = text.split("#### Effective receptive field", 1)[1].split("####", 1)[0]
    assert "Not computed" not in erf and "images × seeds" in erf
    assert re.search(r"\| all-3 \| \d+ px \| \d+ px \| \d+ px \| 8×8 px \| 100 × 2 \|", erf)
    assert "(effective_rf.png)" in text


@pytest.mark.slow
def test_variants_csv_has_the_contract_and_an_independent_front_agrees(results):
    with (results / "variants.csv").open() as fh:
        rows = list(csv.DictReader(fh))
    contract = [
        "variant",
        "n_seeds",
        "val_acc_mean",
        "val_acc_std",
        "val_acc_ci_low",
        "val_acc_ci_high",
        "test_acc_mean",
        "test_acc_std",
        "params",
        "macs",
        "rf",
        "front_macs",
        "front_params",
        "recommended",
        "diff_ci_low",
        "diff_lower_bound",
        "p_holm",
        "pick_share",
    ]
    assert set(contract) <= set(rows[0])
    for cost in ("macs", "params"):
        # Independent recomputation from the CSV alone (definition of Pareto dominance,
        # common practice): on the front iff no other row is at least as accurate and as
        # cheap and better on one; exact twins keep the smaller name.
        pts = [(float(r["val_acc_mean"]), float(r[cost]), r["variant"]) for r in rows]
        for acc, c, name in pts:
            beaten = any(
                (a2 >= acc and c2 <= c and (a2 > acc or c2 < c))
                or (a2 == acc and c2 == c and n2 < name)
                for a2, c2, n2 in pts
                if n2 != name
            )
            row = next(r for r in rows if r["variant"] == name)
            assert row[f"front_{cost}"] == str(not beaten), (cost, name)
    assert json.loads((results / "variants.json").read_text())[0]["variant"] == rows[0]["variant"]
    assert (results / "trials.json").is_file()


@pytest.mark.slow
def test_rebuilding_gives_the_same_markdown_apart_from_the_timestamp(results, tmp_path):
    second = write_report(open_results(results), out=tmp_path / "again")
    first = (results / "report" / "model_card.md").read_text().splitlines()
    again = second.read_text().splitlines()
    assert len(first) == len(again)
    differ = [(a, b) for a, b in zip(first, again, strict=True) if a != b]
    assert all(a.startswith("Generated ") for a, _ in differ) and len(differ) <= 1
    for png in (results / "report").glob("*.[ps][nv]g"):
        assert (tmp_path / "again" / png.name).read_bytes() == png.read_bytes(), png.name


@pytest.mark.slow
def test_the_report_command_says_each_step_in_order(results, tmp_path):
    out = CliRunner().invoke(main, ["report", str(results), "--out", str(tmp_path / "card")])
    assert out.exit_code == 0, out.output
    said = [re.sub(r"^\S+ \S+ INFO ", "", line) for line in out.stderr.splitlines()]
    steps = [
        "start-up: loading pandas",
        "report: reading the trials of tiny",
        "report: analysing",
        "report: writing the tables",
        "report: effective receptive field maps",
        "report: drawing the plots",
        "report: writing the model card",
    ]
    where = [next(i for i, line in enumerate(said) if line.startswith(s)) for s in steps]
    assert where == sorted(where), said
    assert out.stdout.strip() == f"report: {tmp_path / 'card' / 'model_card.md'}"


@pytest.mark.slow
def test_no_password_or_home_path_is_written(results, tmp_path):
    copy = tmp_path / "copy"
    shutil.copytree(results, copy)
    meta = json.loads((copy / "sweep.json").read_text())
    home = str(Path.home())
    meta["command"] = f"kablate run {home}/sweeps/x.toml --storage postgresql://kb:s3cret@db/kb"
    meta["storage"] = "postgresql://kb:s3cret@db/kb"
    (copy / "sweep.json").write_text(json.dumps(meta))
    shutil.rmtree(copy / "trials")  # also: no checkpoints here → the maps are skipped
    text = write_report(open_results(copy)).read_text()
    assert "s3cret" not in text and "kb:***@db" in text
    assert home not in text and "~/sweeps/x.toml" in text
    assert "Not computed: no checkpoints" in text


@pytest.mark.slow
def test_run_records_latency_and_the_report_picks_on_it_or_refuses_it_unmeasured(results, tmp_path):
    plan = json.loads((results / "plan.json").read_text())
    meta = json.loads((results / "sweep.json").read_text())
    for v in plan["variants"]:  # measured by `run`, at the workers' threads
        assert v["latency_q1_ms"] <= v["latency_ms"] <= v["latency_q3_ms"]
        assert v["latency_threads"] == meta["threads"] and v["conv_backends"]
    runner = CliRunner()
    for cost in ("latency", "memory"):
        out = tmp_path / cost
        ok = runner.invoke(
            main, ["report", str(results), "--out", str(out), "--no-erf", "--cost", cost]
        )
        assert ok.exit_code == 0, ok.output
        assert "accuracy_vs_latency.png" in (out / "model_card.md").read_text()
        rows = list(csv.DictReader((out / "variants.csv").open()))
        column = {"latency": "latency_ms", "memory": "act_mem_bytes"}[cost]
        base = next(r for r in rows if r["variant_id"] == plan["baseline"])
        for r in rows:  # the cost ratio is taken on the chosen cost's column
            assert float(r["cost_ratio"]) == pytest.approx(float(r[column]) / float(base[column]))
    copy = tmp_path / "unmeasured"
    shutil.copytree(results, copy)
    for v in plan["variants"]:
        v["latency_ms"] = None
    (copy / "plan.json").write_text(json.dumps(plan))
    bad = runner.invoke(
        main, ["report", str(copy), "--out", str(tmp_path / "b"), "--cost", "latency"]
    )
    assert bad.exit_code == 2 and "latency" in bad.output


def test_pick_table_sets_the_rule_and_the_command_line_overrides_it(tmp_path):
    body = TINY_SWEEP + '\n[pick]\ncost = "params"\nmargin = 0.5\nrule = "one-se"\n'
    sweep = load_sweep(write_sweep(tmp_path, body))
    assert (sweep.pick.cost, sweep.pick.margin, sweep.pick.rule) == ("params", 0.5, "one-se")
    meta = {"resolved": sweep.raw}
    assert pick_settings(meta) == sweep.pick
    over = pick_settings(meta, cost="macs", margin=2.0, rule=None, within_se=None)
    assert (over.cost, over.margin, over.rule) == ("macs", 2.0, "one-se")
    assert pick_settings({"resolved": {}}).margin == 1.0
    with pytest.raises(SweepError, match="pick.margin"):
        pick_settings(meta, margin=-1.0)
    with pytest.raises(SweepError, match="pick.within_se"):
        load_sweep(write_sweep(tmp_path, TINY_SWEEP + "\n[pick]\nwithin_se = -1\n"))
    with pytest.raises(SweepError, match="pick.cost"):
        load_sweep(write_sweep(tmp_path, TINY_SWEEP + '\n[pick]\ncost = "flops"\n'))


@pytest.mark.slow
def test_predictions_reproduce_the_accuracies_of_trials_csv(results):
    import pandas as pd

    preds = pd.read_csv(results / "predictions.csv.gz")
    assert tuple(preds.columns) == PREDICTION_COLUMNS
    trials = pd.read_csv(results / "trials.csv")
    data = json.loads((results / "data.json").read_text())
    for row in trials.itertuples():
        for split in ("val", "test"):
            mine = preds[
                (preds.variant == row.variant) & (preds.seed == row.seed) & (preds.split == split)
            ]
            assert mine["index"].tolist() == data["indices"][split]
            acc = (mine["label"] == mine["predicted"]).mean()
            assert acc == pytest.approx(getattr(row, f"{split}_acc"), abs=1e-12)


@pytest.mark.slow
def test_without_a_finished_baseline_there_is_no_verdict_and_no_map(results, card_context):
    from kablate.analysis.summary import analyze
    from kablate.report.card import render_card
    from kablate.report.trained import erf_maps

    folder = open_results(results)
    rows, curves = folder.rows()
    for row in rows:  # as if the baseline's trials had not run yet
        if row["variant"] == "all-3":
            row.update(status="waiting", val_acc=None, test_acc=None)
    data = folder.data()
    analysis = analyze(rows, curves, folder.plan, folder.meta.get("grids", []), data)
    assert analysis.decision is None  # no baseline to compare with
    assert "has not finished" in render_card(analysis, card_context)
    maps, note = erf_maps(folder, analysis, data)
    assert maps == [] and note == "there is no recommended plan yet to map"


def test_export_writes_the_recommended_variant_and_it_rebuilds_with_its_planned_costs(
    results, tmp_path
):
    out = CliRunner().invoke(
        main, ["export", str(results), "--out", str(tmp_path / "h.json")], catch_exceptions=False
    )
    assert out.exit_code == 0, out.output
    handoff = json.loads((tmp_path / "h.json").read_text())
    rows = json.loads((results / "variants.json").read_text())
    assert handoff["variant"] == next(r["variant"] for r in rows if r["recommended"])
    assert handoff["recommended"] is True
    net = build_handoff(tmp_path / "h.json")
    # Checked with torch's own counters: parameters by numel, MACs by FlopCounterMode, which
    # counts 2 FLOPs per multiply-accumulate.
    assert sum(p.numel() for p in net.parameters()) == handoff["costs"]["params"]
    with FlopCounterMode(display=False) as counter:
        net.eval()(torch.zeros(1, *handoff["input"]))
    assert counter.get_total_flops() == 2 * handoff["costs"]["macs"]
    unknown = CliRunner().invoke(main, ["export", str(results), "--variant", "stem5"])
    assert unknown.exit_code == 2 and "did you mean `stem-5`" in unknown.output


@pytest.mark.slow
def test_the_report_describes_what_each_stem_learned(results):
    """The baseline (3×3 stem) and stem-5 from their checkpoints: the atlas section, its
    plots, and its numbers as tables and weights."""
    text = card_text(results)
    section = text.split("#### What the stem learned", 1)[1].split("\n####", 1)[0]
    assert "Not computed" not in section
    assert "| all-3 (" in section and "| 3×3 | 2 × " in section
    assert "| stem-5 | 5×5 | 2 × " in section
    assert "The 5×5 stem of stem-5 leaves" in section
    for plot in ("stem_atlas", "stem_spectrum"):
        assert f"]({plot}.png)" in text
        assert (results / "report" / f"{plot}.png").is_file()
    rows = {r["variant"]: r for r in csv.DictReader((results / "stem.csv").open())}
    assert set(rows) == {"all-3", "stem-5"} and rows["stem-5"]["stem"] == "5×5"
    shares = [float(rows["stem-5"][f"share_{b}_mean"]) for b in ("low", "middle", "high")]
    assert sum(shares) == pytest.approx(1)
    seeds = list(csv.DictReader((results / "stem_seeds.csv").open()))
    assert len(seeds) == 4
    with np.load(results / "report" / "stem_filters.npz") as saved:
        assert sorted(saved.files) == ["all-3/s0", "all-3/s1", "stem-5/s0", "stem-5/s1"]
        # Each is the first conv weight of a trial's scored weights (its checkpoint).
        for path in (results / "trials").glob(f"*/{CHECKPOINT}"):
            state = scored_state(torch.load(path, weights_only=True))
            first = next(v for v in state.values() if v.ndim == 4).numpy()
            assert sum(np.array_equal(saved[k], first) for k in saved.files) == 1, path


def test_export_onnx_carries_fresh_weights_or_a_chosen_seeds_scored_weights(results, tmp_path):
    ort = pytest.importorskip("onnxruntime")
    from kablate.report.handoff import find_variant
    from kablate.results.checkpoint import scored_states

    runner = CliRunner()
    args = ["export", str(results), "--variant", "all-3", "--onnx"]
    fresh = runner.invoke(main, [*args, "--out", str(tmp_path / "fresh.json")])
    trained = runner.invoke(main, [*args, "--seed", "1", "--out", str(tmp_path / "s1.json")])
    assert fresh.exit_code == 0 and trained.exit_code == 0, fresh.output + trained.output
    assert "fresh initial weights" in fresh.output and "-s1 was scored with" in trained.output
    _, catalog, item = find_variant(open_results(results), "all-3")
    torch.manual_seed(3)
    x = torch.randn(2, *catalog.in_shape)
    net = build_network(item.blueprint).eval()
    net.load_state_dict(scored_states(results, item.variant.id, [1])[1])
    with torch.no_grad():
        want = net(x).numpy()

    def run(name):  # the reference: ONNX Runtime's own session on the written file
        session = ort.InferenceSession(str(tmp_path / name), providers=["CPUExecutionProvider"])
        return session.run(None, {session.get_inputs()[0].name: x.numpy()})[0]

    assert np.abs(run("s1.onnx") - want).max() <= 1e-4  # the trial's scored weights
    assert np.abs(run("fresh.onnx") - want).max() > 1e-2  # not those
    missing = runner.invoke(main, [*args, "--seed", "7"])
    assert missing.exit_code == 2 and "no readable checkpoint of all-3 seed 7" in missing.output
    bare = runner.invoke(main, ["export", str(results), "--seed", "1"])
    assert bare.exit_code == 2 and "add --onnx" in bare.output

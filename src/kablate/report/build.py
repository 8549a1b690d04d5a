"""`kablate report`: tables, plots and the model-card section for a results folder."""

from __future__ import annotations

import json
from pathlib import Path

from kablate import __version__
from kablate.analysis.summary import Analysis, analyze
from kablate.report.card import render_card
from kablate.report.plots import (
    plot_accuracy_vs_cost,
    plot_grid_heatmap,
    plot_learning_curves,
    plot_rf_vs_accuracy,
)
from kablate.trials.export import CURVE_COLUMNS, TRIAL_COLUMNS, write_csv
from kablate.trials.meta import read_json, write_json
from kablate.trials.results import DATA_FILE, ResultsFolder

VARIANT_COLUMNS = (
    "variant",
    "variant_id",
    "n_seeds",
    "n_missing",
    "n_diverged",
    "val_acc_mean",
    "val_acc_std",
    "val_acc_ci_low",
    "val_acc_ci_high",
    "test_acc_mean",
    "test_acc_std",
    "test_acc_ci_low",
    "test_acc_ci_high",
    "params",
    "macs",
    "flops",
    "rf",
    "act_mem_bytes",
    "latency_ms",
    "train_seconds_mean",
    "front_macs",
    "front_params",
    "front_all",
    "recommended",
    "plan",
)


def subtitle(meta: dict, data: dict) -> str:
    recipe = meta["resolved"].get("recipe", {})
    seeds = ",".join(map(str, meta["seeds"]))
    return (
        f"sweep {meta['name']} · {data['source']} ({data['sizes']['train']} train) · "
        f"seeds {seeds} · {recipe.get('epochs')} epochs"
    )


def write_tables(folder: ResultsFolder, analysis: Analysis) -> None:
    out = folder.path
    write_csv(out / "trials.csv", analysis.trials.to_dict("records"), TRIAL_COLUMNS)
    write_csv(out / "curves.csv", analysis.curves.to_dict("records"), CURVE_COLUMNS)
    table = analysis.variants.reindex(columns=list(VARIANT_COLUMNS))
    write_csv(out / "variants.csv", table.to_dict("records"), VARIANT_COLUMNS)
    write_json(out / "variants.json", json.loads(table.to_json(orient="records")))
    write_json(out / "trials.json", json.loads(analysis.trials.to_json(orient="records")))


def write_report(
    folder: ResultsFolder, out: Path | None = None, cost: str = "macs", within_se: float = 1.0
) -> Path:
    """Analyse the folder's trials and write tables, plots and ``model_card.md``.

    Returns:
        The path of the Markdown file.
    """
    rows, curves = folder.rows()
    analysis = analyze(rows, curves, folder.plan, folder.meta.get("grids", []), cost, within_se)
    write_tables(folder, analysis)
    out = out or folder.path / "report"
    out.mkdir(parents=True, exist_ok=True)
    data = read_json(folder.path / DATA_FILE)
    sub = subtitle(folder.meta, data)
    plots: list[Path] = []
    if (analysis.variants["n_seeds"] > 0).any():
        plots += plot_accuracy_vs_cost(analysis, "params", "parameters", out, sub)
        plots += plot_accuracy_vs_cost(analysis, "macs", "MACs", out, sub)
        plots += plot_rf_vs_accuracy(analysis, out, sub)
        if len(analysis.curves):
            plots += plot_learning_curves(analysis, out, sub)
        if analysis.grid is not None:
            plots += plot_grid_heatmap(analysis, out, sub)
    pngs = [p.name for p in plots if p.suffix == ".png"]
    card = render_card(
        analysis, folder.meta, data, pngs, __version__, folder.meta.get("environment", {})
    )
    path = out / "model_card.md"
    path.write_text(card)
    return path

"""`kablate report`: tables, plots and the model-card section for a results folder."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from kablate import __version__
from kablate.analysis.halving import halving_account
from kablate.analysis.summary import Analysis, analyze, pick_settings
from kablate.console import step
from kablate.errors import KablateError
from kablate.report.card import PLOT_CAPTIONS, CardContext, render_card
from kablate.report.erf_plots import plot_effective_rf
from kablate.report.plot_style import rendering
from kablate.report.plots import (
    plot_accuracy_vs_cost,
    plot_confusion,
    plot_grid_heatmap,
    plot_learning_curves,
    plot_rf_vs_accuracy,
)
from kablate.report.search_plots import plot_hypervolume
from kablate.report.stem_card import STEM_FILTERS, STEM_SEEDS_TABLE, STEM_TABLE
from kablate.report.stem_plots import plot_stem_atlas, plot_stem_spectrum
from kablate.results.columns import TRIAL_COLUMNS, VARIANT_COLUMNS
from kablate.results.data_record import DataRecord
from kablate.results.folder import ResultsFolder
from kablate.results.paths import CARD_FILE, REPORT_DIR, TRIALS_JSON, VARIANTS_FILE, VARIANTS_JSON
from kablate.results.redact import scrub
from kablate.results.tables import write_predictions, write_trial_tables
from kablate.results.write import writable_folder, write_csv, write_json, write_text
from kablate.spec.costs import COSTS
from kablate.spec.schema import PickSpec


def subtitle(meta: dict, data: DataRecord) -> str:
    """Sweep, dataset, seeds and budget, for every plot."""
    recipe = meta["resolved"].get("recipe", {})
    seeds = ",".join(map(str, meta["seeds"]))
    budget = f"{recipe.get('epochs')} epochs"
    if recipe.get("max_steps"):
        budget += f" (≤ {recipe['max_steps']} steps)"
    if meta.get("budget_seconds"):
        budget += f", {meta['budget_seconds'] / 3600:.2g} h budget"
    return (
        f"sweep {meta['name']} · {data.source} ({data.sizes['train']} train, "
        f"{data.sizes['val']} val) · seeds {seeds} · {budget}"
    )


def write_tables(out: Path, analysis: Analysis, data: DataRecord) -> None:
    """trials.csv/json, variants.csv/json, curves.csv and predictions.csv.gz in ``out``."""
    rows = analysis.trials.to_dict("records")
    write_predictions(out, rows, data)
    write_trial_tables(out, rows, analysis.curves.to_dict("records"))
    table = analysis.variants.reindex(columns=list(VARIANT_COLUMNS))
    write_csv(out / VARIANTS_FILE, table.to_dict("records"), VARIANT_COLUMNS)
    write_json(out / VARIANTS_JSON, json.loads(table.to_json(orient="records")))
    trials = analysis.trials.reindex(columns=list(TRIAL_COLUMNS))
    write_json(out / TRIALS_JSON, json.loads(trials.to_json(orient="records")))


def draw_plots(analysis: Analysis, out: Path, sub: str) -> list[Path]:
    """Every plot the data supports; returns the files written (PNG and SVG)."""
    plots: list[Path] = []
    for stem in PLOT_CAPTIONS:  # a plot the data no longer supports must not linger
        for ext in ("png", "svg"):
            (out / f"{stem}.{ext}").unlink(missing_ok=True)
    if not (analysis.variants["n_seeds"] > 0).any():
        return plots
    with rendering():
        for cost in COSTS.values():  # a cost that was not measured has no front
            if analysis.variants[cost.front].notna().all():
                plots += plot_accuracy_vs_cost(analysis, cost.column, cost.axis, out, sub)
        plots += plot_rf_vs_accuracy(analysis, out, sub)
        if len(analysis.curves):
            plots += plot_learning_curves(analysis, out, sub)
        if analysis.grid is not None:
            plots += plot_grid_heatmap(analysis, out, sub)
        if analysis.decision is not None:
            plots += plot_confusion(analysis, out, sub)
        if analysis.erf:
            rec = analysis.recommended or ""
            roles = ["recommended" if m.variant == rec else "baseline" for m in analysis.erf]
            if len(analysis.erf) == 1 and rec == analysis.baseline:
                roles = ["recommended and baseline"]
            plots += plot_effective_rf(analysis.erf, roles, out, sub)
        if analysis.stem is not None:
            plots += plot_stem_atlas(analysis.stem, out, sub)
            plots += plot_stem_spectrum(analysis.stem, out, sub)
        if analysis.search:
            plots += plot_hypervolume(analysis.search, out, sub)
    return plots


def guarded(compute, empty) -> tuple:
    """``compute()`` → (value, note); an extra that fails gives (empty, why) instead: never
    lose the report over an extra (erf maps, the stem atlas)."""
    try:
        return compute()
    except Exception as exc:
        note = str(exc) if isinstance(exc, KablateError) else f"{type(exc).__name__}: {exc}"
        return empty, note.splitlines()[0] if note else "failed"


def write_stem_tables(tables: Path, out: Path, analysis: Analysis) -> None:
    """The stem atlas as data: per variant, per seed, and the weights it described."""
    for name in (STEM_TABLE, STEM_SEEDS_TABLE):
        (tables / name).unlink(missing_ok=True)
    (out / STEM_FILTERS).unlink(missing_ok=True)
    atlas = analysis.stem
    if atlas is None:
        return
    atlas.summary.to_csv(tables / STEM_TABLE, index=False)
    atlas.per_seed.to_csv(tables / STEM_SEEDS_TABLE, index=False)
    weights = {f"{v}/s{seed}": w for v, seeds in atlas.filters.items() for seed, w in seeds.items()}
    with (out / STEM_FILTERS).open("wb") as f:
        np.savez_compressed(f, **weights)


def write_report(
    folder: ResultsFolder,
    out: Path | None = None,
    pick: PickSpec | None = None,
    with_erf: bool = True,
) -> Path:
    """Analyse the folder's trials and write tables, plots and ``model_card.md``.

    Args:
        out: where the card and plots go, and then the tables too, so that nothing is written
            into the results folder (which may be read-only); None: the tables go into the
            results folder and the card into its ``report/``.
        pick: the selection rule's settings; None takes the sweep's ``[pick]``.
        with_erf: compute the effective-receptive-field maps (needs checkpoints and data).

    Returns:
        The path of the Markdown file.
    """
    pick = pick or pick_settings(folder.meta)
    step("report", f"reading the trials of {folder.name}")
    rows, curves = folder.rows()
    data = folder.data()
    step("report", "analysing the finished trials (paired bootstrap over seeds and images)")
    analysis = analyze(rows, curves, folder.plan, folder.meta.get("grids", []), data, pick)
    analysis.race = folder.race()
    analysis.halving = halving_account(folder.halving(), analysis.trials, analysis.curves)
    analysis.search = folder.search()
    step("report", "writing the tables (trials, variants, curves, predictions)")
    if out is None:
        hint = "; give --out DIR to write the report elsewhere"
        tables = writable_folder(folder.path, "results folder", hint)
        out = writable_folder(folder.path / REPORT_DIR, "report folder", hint)
    else:
        tables = writable_folder(out, "--out folder")
    write_tables(tables, analysis, data)
    if with_erf:
        from kablate.report.trained import erf_maps

        step("report", "effective receptive field maps (loading checkpoints)")
        analysis.erf, analysis.erf_note = guarded(lambda: erf_maps(folder, analysis, data), [])
    else:
        analysis.erf_note = "skipped on request"
    from kablate.report.stem_weights import stem_atlas

    step("report", "what the stem learned (loading checkpoints)")
    analysis.stem, analysis.stem_note = guarded(lambda: stem_atlas(folder, analysis), None)
    write_stem_tables(tables, out, analysis)
    step("report", "drawing the plots")
    plots = draw_plots(analysis, out, subtitle(folder.meta, data))
    step("report", "writing the model card")
    ctx = CardContext(
        folder.meta,
        data,
        __version__,
        tuple(p.name for p in plots if p.suffix == ".png"),
        COSTS[pick.cost].label,
    )
    path = out / CARD_FILE
    write_text(path, scrub(render_card(analysis, ctx)))
    return path

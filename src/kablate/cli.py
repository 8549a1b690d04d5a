"""The command line. Thin: it parses, calls the pipeline and prints."""

from __future__ import annotations

import json
import math
import os
import re
import shlex
import signal
import sys
import threading
import time
from pathlib import Path

import click

from kablate import __version__
from kablate.console import Steps, show_steps, step
from kablate.errors import EXIT_STOPPED, DiskFullError, KablateError, UsageError, is_disk_full
from kablate.spec.costs import COST_NAMES
from kablate.spec.schema import PICK_RULES

EPILOG_PLAN = """\b
Examples:
  kablate plan sweeps/stem-size.toml
  kablate plan sweeps/stem-size.toml --format json --latency > plan.json
  kablate plan sweeps/*.toml
  kablate plan --model torchvision.models:resnet18 --input 3x224x224
  kablate plan --model mypkg.nets:build --input 3x32x32 --kwargs '{"num_classes": 10}'
--model imports the named module, which runs its code: name only code you trust.
"""
EPILOG_RUN = """\b
Examples:
  kablate run sweeps/quickstart.toml
  kablate run sweeps/stem-size.toml --workers 2 --budget 8h
  kablate run sweeps/stem-size.toml --storage postgresql://kablate@db-host/kablate
Rerun the same command to continue a sweep: finished trials never run again.
"""
EPILOG_STATUS = """\b
Example:
  kablate status results/quickstart
  kablate status results/quickstart --format json
Accuracy so far and the leader under the sweep's [pick] rule come from the same analysis as
the report; the leader is provisional until every planned trial has a result.
A [search] sweep shows its search; until it has chosen its finalists, that is all there is
(json "phase": "search", the trials' figures null).
"""
EPILOG_EXPORT = """\b
Example:
  kablate export results/quickstart
  kablate export results/resnet-stages --variant stage1-5
  kablate export results/quickstart --onnx --seed 0   # + handoff/<variant>.onnx, seed 0's weights
In Python, build the exported network (freshly initialised) or rewrite your own model:
  from kablate.nets.handoff import build_handoff, apply_handoff
  net = build_handoff("results/quickstart/handoff/all-3.json")
  model = apply_handoff(resnet18(num_classes=10), "results/resnet-stages/handoff/stage1-5.json")
"""

EPILOG_REPORT = """\b
Example:
  kablate report results/quickstart
  kablate report results/quickstart --margin 0.5 --cost params --out card
  kablate report results/quickstart --rule one-se --within-se 2
The rule, margin, cost and tolerance default to the sweep file's [pick] table.
"""


def parse_duration(text: str) -> float:
    """'8h', '90m', '2h30m', '45s' → seconds."""
    match = re.fullmatch(r"\s*(?:(\d+)h)?\s*(?:(\d+)m)?\s*(?:(\d+)s)?\s*", text or "")
    if not text or not match or not any(match.groups()):
        raise UsageError(f"--budget must be a duration such as 8h, 90m or 2h30m, but got {text!r}")
    h, m, s = (int(g) if g else 0 for g in match.groups())
    if h * 3600 + m * 60 + s == 0:
        raise UsageError(f"--budget must be longer than zero, but got {text!r}")
    return h * 3600 + m * 60 + s


def parse_checkpoint_seconds(text: str) -> float:
    """'30', '0', '2.5' → seconds; a negative number, NaN or a non-number is refused."""
    try:
        seconds = float(text)
    except ValueError:
        seconds = math.nan
    if not seconds >= 0:  # also catches NaN
        raise UsageError(
            "--checkpoint-seconds must be a number of seconds ≥ 0 (0: after every epoch), "
            f"but got {text!r}"
        )
    return seconds


def echo_document(text: str) -> None:
    """Print a table, JSON or CSV document with exactly one line break at its end (a CSV
    writer already ends each row with one; a second would be an empty row)."""
    click.echo(text, nl=not text.endswith("\n"))


def quit_while_starting(signum, frame) -> None:
    """Ctrl-C before a command has imported what it needs: leave at once, in one line.

    A KeyboardInterrupt raised inside an import can leave a half-imported module behind (numpy
    then fails with a RecursionError of its own), so this handler does not raise one.
    """
    os.write(2, b"interrupted (Ctrl-C) while starting; nothing was written\n")
    os._exit(130)


def started() -> None:
    """The command's imports are done: from here Ctrl-C raises KeyboardInterrupt again (which
    `kablate run` turns into a clean stop)."""
    if threading.current_thread() is threading.main_thread():
        signal.signal(signal.SIGINT, signal.default_int_handler)


class KablateGroup(click.Group):
    """Turns our errors into one line on stderr and their exit code (errors.py), with no
    traceback, and Ctrl-C into exit code 130 with one line."""

    def invoke(self, ctx: click.Context):
        main_thread = threading.current_thread() is threading.main_thread()
        previous = signal.signal(signal.SIGINT, quit_while_starting) if main_thread else None
        try:
            return super().invoke(ctx)
        except KablateError as exc:
            click.echo(f"error: {exc}", err=True)
            sys.exit(exc.exit_code)
        except KeyboardInterrupt:
            click.echo("interrupted (Ctrl-C)", err=True)
            sys.exit(130)
        except OSError as exc:
            if not is_disk_full(exc):
                raise
            error = DiskFullError(exc.filename or Path.cwd())
            click.echo(f"error: {error}", err=True)
            sys.exit(error.exit_code)
        finally:
            if previous is not None:
                signal.signal(signal.SIGINT, previous)

    def format_commands(self, ctx: click.Context, formatter: click.HelpFormatter) -> None:
        """List each command with its whole first sentence, wrapped to the width instead of
        cut off with "..." (click shortens it to fit one line)."""
        commands = [(name, self.get_command(ctx, name)) for name in self.list_commands(ctx)]
        rows = [
            (name, cmd.get_short_help_str(limit=1000))
            for name, cmd in commands
            if cmd and not cmd.hidden
        ]
        if rows:
            with formatter.section("Commands"):
                formatter.write_dl(rows)


@click.group(cls=KablateGroup, context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="kablate")
def main() -> None:
    """kablate: kernel-size ablations of compact CNNs on a CPU.

    Plan the variants and their costs, train every variant with several seeds, and write a
    report with a recommended kernel plan and a model-card section.
    """


@main.command(epilog=EPILOG_PLAN)
@click.argument("sweeps", nargs=-1, type=click.Path(path_type=Path))
@click.option(
    "--model",
    "factory",
    default=None,
    metavar="PKG.MODULE:FACTORY",
    help="Measure one model instead of a sweep: the callable that builds it, or timm:NAME. "
    "This imports and runs that module's code.",
)
@click.option("--input", "input_shape", default=None, metavar="CxHxW", help="With --model.")
@click.option(
    "--kwargs",
    "factory_kwargs",
    default=None,
    metavar="JSON",
    help="With --model: keyword arguments for the factory, e.g. '{\"num_classes\": 10}'.",
)
@click.option(
    "--batch-size",
    type=click.IntRange(min=1),
    default=1,
    show_default=True,
    help="With --model: the batch that activation memory is given for.",
)
@click.option(
    "--format",
    "fmt",
    type=click.Choice(["table", "json", "csv"]),
    default="table",
    show_default=True,
    help="Output format.",
)
@click.option(
    "--latency",
    is_flag=True,
    help="Also measure CPU latency (batch 1 and the recipe's batch size; median and IQR of "
    "interleaved rounds, conv backends recorded).",
)
@click.option(
    "--threads",
    type=click.IntRange(min=1),
    default=None,
    help="Threads for --latency (default: the sweep's [target] threads, else torch's).",
)
def plan(
    sweeps: tuple[Path, ...],
    factory: str | None,
    input_shape: str | None,
    factory_kwargs: str | None,
    batch_size: int,
    fmt: str,
    latency: bool,
    threads: int | None,
) -> None:
    """Expand one or more sweeps into variants with their static costs, without training; or,
    with --model, measure one model as it is."""
    if bool(sweeps) == (factory is not None):
        raise UsageError(
            "give sweep files (e.g. sweeps/quickstart.toml) or --model PKG.MODULE:FACTORY, "
            "one of the two"
        )
    if factory is not None:
        if latency:
            raise UsageError("--latency is not available with --model yet; drop --latency")
        plan_one_model(factory, input_shape, factory_kwargs, batch_size, fmt)
        return
    from kablate.costs.plan_output import (
        catalog_csv,
        catalog_json,
        catalog_table,
        catalogs_csv,
        catalogs_json,
    )
    from kablate.costs.search_plan import search_lines

    several = len(sweeps) > 1
    planned = [(path, plan_one_sweep(path, latency, threads, several)) for path in sweeps]
    catalogs = [(path, c) for path, c in planned if not isinstance(c, KablateError)]
    if several and fmt != "table":
        echo_document({"json": catalogs_json, "csv": catalogs_csv}[fmt](planned))
    elif catalogs:  # one table per file, under its path when there are several
        render = {"table": catalog_table, "json": catalog_json, "csv": catalog_csv}[fmt]
        heads = [f"{path}\n" if several else "" for path, _ in catalogs]
        echo_document("\n\n".join(h + render(c) for h, (_, c) in zip(heads, catalogs, strict=True)))
    for path, catalog in catalogs:  # a [search] space: its size and what the budget covers
        for line in search_lines(catalog):
            click.echo(f"{path}: {line}" if several else line, err=fmt != "table")
    if fmt != "table":  # the table lists them; keep JSON and CSV parseable on stdout
        for path, catalog in catalogs:
            where = f"{path}: " if several else ""
            for item, reason in catalog.dropped:
                click.echo(f"{where}dropped {item.name}: {reason}", err=True)
            for warning in catalog.warnings:
                click.echo(f"{where}warning: {warning}", err=True)
    if len(catalogs) < len(sweeps):
        sys.exit(max(c.exit_code for _, c in planned if isinstance(c, KablateError)))


def plan_one_sweep(path: Path, latency: bool, threads: int | None, several: bool):
    """The costed catalog of one sweep file. With several files a refused one is reported on
    stderr and returned as its error, so that the others are still planned."""
    from kablate.costs.catalog import build_catalog, measure_latencies
    from kablate.costs.pointless import pointless_kernels
    from kablate.spec.loader import load_sweep
    from kablate.trials.preflight import run_preflight

    try:
        catalog = build_catalog(load_sweep(path))
        catalog.warnings += pointless_kernels(catalog)
        run_preflight(catalog)  # before --latency allocates anything at the recipe's batch size
        if latency:
            measure_latencies(catalog, threads)
    except KablateError as exc:
        if not several:
            raise
        click.echo(f"error: {exc}", err=True)
        return exc
    return catalog


def plan_one_model(
    factory: str, input_shape: str | None, factory_kwargs: str | None, batch_size: int, fmt: str
) -> None:
    """`kablate plan --model`: one model, unchanged, in the plan's formats."""
    if input_shape is None:
        raise UsageError("--model needs --input CxHxW, e.g. --input 3x224x224")
    from kablate.costs.model_plan import model_csv, model_json, model_table, plan_model
    from kablate.nets.factory import parse_input_shape, parse_kwargs

    shape, kwargs = parse_input_shape(input_shape), parse_kwargs(factory_kwargs)
    result = plan_model(factory, kwargs, shape, batch_size)
    render = {"table": model_table, "json": model_json, "csv": model_csv}[fmt]
    echo_document(render(result))
    if fmt != "table":
        for note in result.cost.notes:
            click.echo(f"note: {note}", err=True)


def speaking(imports: str) -> Steps:
    """A command's `console.Steps`: its step lines on the console from the first one (before the
    heavy imports: those alone take seconds), and a line after every silence."""
    show_steps()
    step("start-up", f"loading {imports}")
    return Steps()


@main.command(epilog=EPILOG_RUN)
@click.argument("sweep", type=click.Path(path_type=Path))
@click.option(
    "--workers",
    type=click.IntRange(min=1),
    default=None,
    help="Worker processes on this machine (default: one per core).",
)
@click.option(
    "--threads",
    type=click.IntRange(min=1),
    default=None,
    help="Threads per worker (default: cores // workers).",
)
@click.option(
    "--storage",
    default=None,
    metavar="URL",
    help="Study storage URL, e.g. postgresql://user@host/db (default: a journal "
    "file in the results folder; also $KABLATE_STORAGE).",
)
@click.option(
    "--budget",
    default=None,
    metavar="DURATION",
    help="Wall-clock budget such as 8h, 90m or 2h30m: no trial starts that would overrun it.",
)
@click.option(
    "--results",
    "results_root",
    type=click.Path(path_type=Path),
    default=Path("results"),
    show_default=True,
    help="Output root.",
)
@click.option(
    "--device",
    default="cpu",
    show_default=True,
    help="torch device for training: cpu, or cuda / cuda:N when present (checked first).",
)
@click.option(
    "--dry-run",
    is_flag=True,
    help="Time a few steps of each variant, print the estimate and the order; train nothing.",
)
@click.option(
    "--checkpoint-seconds",
    "checkpoint_seconds",
    default=None,
    metavar="N",
    help="Checkpoint each trial when waiting longer would risk more than N seconds of work "
    "(or one epoch, when an epoch takes longer), always at its end and when stopped; "
    "0: after every epoch (default: 30).",
)
@click.option("--no-report", is_flag=True, help="Skip writing the report at the end.")
def run(
    sweep: Path,
    workers: int | None,
    threads: int | None,
    storage: str | None,
    budget: str | None,
    results_root: Path,
    device: str,
    dry_run: bool,
    checkpoint_seconds: str | None,
    no_report: bool,
) -> None:
    """Train every (variant, seed) trial of a sweep, then write the report."""
    every = parse_checkpoint_seconds(checkpoint_seconds) if checkpoint_seconds is not None else None
    with speaking("torch and optuna"):
        from kablate.trials.outcome import verdict
        from kablate.trials.results import open_results
        from kablate.trials.runner import RunOptions, run_sweep

        started()
        opts = RunOptions(
            results_root=results_root,
            storage=storage,
            workers=workers or 0,
            threads=threads or 0,
            device=device,
            budget_seconds=parse_duration(budget) if budget else 0.0,
            dry_run=dry_run,
            **({"checkpoint_seconds": every} if every is not None else {}),
            command="kablate " + " ".join(shlex.quote(a) for a in sys.argv[1:]),
            echo=click.echo,
        )
        start = time.time()
        summary = run_sweep(sweep, opts)
        if dry_run:
            return
        code, why = verdict(summary)
        counts = ", ".join(f"{n} {s}" for s, n in sorted(summary.counts.items()))
        if summary.n_to_run == 0:
            click.echo(
                f"nothing new to train: all {summary.n_jobs} trials were already finished "
                f"({counts})"
            )
        elif counts:
            took = time.time() - start
            click.echo(f"ran {summary.n_ran} trials in {took:.0f}s; sweep now: {counts}")
        if code == EXIT_STOPPED:
            click.echo(
                "stopped: the interrupted trials are back in the queue and resume from their last "
                f"checkpoint. Resume with the same command: {opts.command}",
                err=True,
            )
        if not no_report and code != EXIT_STOPPED and summary.counts.get("done"):
            # Imported only now: matplotlib would take seconds of the start-up from the workers.
            from kablate.report.compose import write_report

            path = write_report(open_results(summary.results_dir, storage))
            click.echo(f"report: {path}")
        if why:
            click.echo(f"error: {why}", err=True)
        sys.exit(code)


@main.command(epilog=EPILOG_STATUS)
@click.argument("results", type=click.Path(path_type=Path))
@click.option(
    "--format", "fmt", type=click.Choice(["text", "json"]), default="text", show_default=True
)
@click.option(
    "--storage",
    default=None,
    metavar="URL",
    help="Study storage URL, if not the one recorded in the folder.",
)
def status(results: Path, fmt: str, storage: str | None) -> None:
    """Show progress and how the variants stand so far (safe while a run is going)."""
    from kablate.trials.status import folder_status, format_status

    started()
    summary = folder_status(results, storage)
    if fmt == "json":
        click.echo(json.dumps(summary.to_dict(), indent=2))
    else:
        click.echo(format_status(summary))


@main.command(epilog=EPILOG_REPORT)
@click.argument("results", type=click.Path(path_type=Path))
@click.option(
    "--out",
    type=click.Path(path_type=Path),
    default=None,
    help="Where to write the report and its tables; the results folder is then left as it is "
    "(default: the tables in RESULTS, the report in RESULTS/report).",
)
@click.option(
    "--rule",
    type=click.Choice(PICK_RULES),
    default=None,
    help="How the plan is picked: the cheapest plan shown within the margin of the baseline "
    "(margin), or the one-standard-error rule (one-se). Default: the sweep's [pick] rule, "
    "else margin.",
)
@click.option(
    "--margin",
    type=float,
    default=None,
    help="The accuracy loss, in percentage points, accepted for a cheaper plan (default: "
    "the sweep's [pick] margin, else 1).",
)
@click.option(
    "--cost",
    type=click.Choice(list(COST_NAMES)),
    default=None,
    help="The cost the recommended plan minimises (default: the sweep's [pick] cost, else macs).",
)
@click.option(
    "--within-se",
    type=float,
    default=None,
    help="The one-se rule's tolerance, in standard errors (seeds and images) of the best "
    "variant (default: the sweep's [pick] within_se, else 1).",
)
@click.option(
    "--storage",
    default=None,
    metavar="URL",
    help="Study storage URL, if not the one recorded in the folder.",
)
@click.option(
    "--no-erf",
    is_flag=True,
    help="Skip the effective-receptive-field maps (they load checkpoints and data).",
)
def report(
    results: Path,
    out: Path | None,
    rule: str | None,
    margin: float | None,
    cost: str | None,
    within_se: float | None,
    storage: str | None,
    no_erf: bool,
) -> None:
    """Rebuild the tables, plots and model-card section of a results folder."""
    with speaking("pandas, statsmodels and matplotlib"):
        from kablate.analysis.summary import pick_settings
        from kablate.report.compose import write_report
        from kablate.trials.results import open_results

        started()
        folder = open_results(results, storage)
        pick = pick_settings(folder.meta, rule=rule, margin=margin, cost=cost, within_se=within_se)
        path = write_report(folder, out, pick, not no_erf)
    click.echo(f"report: {path}")


@main.command(epilog=EPILOG_EXPORT)
@click.argument("results", type=click.Path(path_type=Path))
@click.option(
    "--variant",
    default=None,
    help="The variant to export (default: the one the folder's last report recommends).",
)
@click.option(
    "--out",
    type=click.Path(path_type=Path),
    default=None,
    help="The file to write (default: RESULTS/handoff/<variant>.json).",
)
@click.option(
    "--storage",
    default=None,
    metavar="URL",
    help="Study storage URL, if not the one recorded in the folder.",
)
@click.option(
    "--onnx",
    is_flag=True,
    help="Also write the variant as an ONNX file beside the handoff (needs the onnx extra).",
)
@click.option(
    "--seed",
    type=click.IntRange(min=0),
    default=None,
    help="With --onnx: carry the weights this seed's trial was scored with (its checkpoint "
    "must be in RESULTS/trials/); default: fresh initial weights.",
)
def export(
    results: Path,
    variant: str | None,
    out: Path | None,
    storage: str | None,
    onnx: bool,
    seed: int | None,
) -> None:
    """Write a variant as a file your code can build: kablate's own network, or the list of
    rewrites to apply to your model; with --onnx, also as an ONNX file."""
    from kablate.report.handoff import write_handoff, write_onnx_handoff
    from kablate.trials.results import open_results

    started()
    if seed is not None and not onnx:
        raise UsageError("--seed chooses the weights of the ONNX file: add --onnx")
    folder = open_results(results, storage)
    path = write_handoff(folder, variant, out)
    click.echo(f"handoff: {path}")
    if onnx:
        onnx_out = out.with_suffix(".onnx") if out else None
        onnx_path, weights = write_onnx_handoff(folder, variant, seed, onnx_out)
        click.echo(f"onnx: {onnx_path} ({weights})")

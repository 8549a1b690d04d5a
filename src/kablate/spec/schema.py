"""The typed, frozen settings a sweep file resolves to.

One dataclass per concept: the data to train on, the base network, the training recipe, the
kernel plans and the sweep around them. `kablate.spec.loader` fills them from TOML; every
other package reads only these objects, never raw TOML.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from typing import Any, Literal

from kablate.spec.bounds import (
    MAX_BATCH,
    MAX_CHANNELS,
    MAX_CONVS,
    MAX_CROP_PADDING,
    MAX_SEED,
    MAX_SIDE,
    MAX_STAGES,
    MAX_STRIDE,
    MAX_THREADS,
)
from kablate.spec.costs import COST_NAMES
from kablate.spec.fields import Check, at_least, below, between, check

SourceName = Literal[
    "digits", "mnist", "fashion-mnist", "kmnist", "cifar10", "cifar100", "svhn", "folder"
]


def kernel_spec(allow_empty: bool = False) -> Check:
    """A check that a base-network kernel spec parses, so that a bad one is reported under its
    own key (``network.stages[1].kernel``) at load time, not under the first plan that meets it.
    ``allow_empty``: ``""`` means "the network's kernel" (a stage's or the stem's default)."""

    def check_spec(value: str) -> str | None:
        # imported here: kablate.plans reads these dataclasses, so a top-level import would cycle
        from kablate.plans.grammar import KernelSpecError, parse_kernel

        if allow_empty and value == "":
            return None
        try:
            spec = parse_kernel(value)
        except KernelSpecError as exc:
            return str(exc)
        if spec.stride:
            return (
                f'gives a stride ("{value}"), which only a plan may: the base network sets the '
                "stem's stride with `[network.stem] stride` and a stage's with its `down`"
            )
        return None

    return check_spec


@dataclass(frozen=True)
class DataSpec:
    """Which images to train, validate and test on."""

    source: SourceName = "digits"
    root: str = "data"  # where torchvision sources and `folder` look; relative to the cwd
    download: bool = False
    train_size: int = check(at_least(0), 0)  # 0: all of the training pool
    val_size: int = check(at_least(1), 300)
    # Images carved out of the training pool to choose an epoch on (recipe.test_from = "best"),
    # so that the epoch is never chosen on the validation images that score it. 0: no fold.
    stop_size: int = check(at_least(0), 0)
    test_size: int = check(at_least(0), 0)  # 0: all of the test split
    test_fraction: float = check(between(0.05, 0.5), 0.25)  # for sources with no test split
    split_seed: int = check(between(0, MAX_SEED, "an integer"), 0)


@dataclass(frozen=True)
class StemSpec:
    out_ch: int = check(between(1, MAX_CHANNELS, "an integer"), 16)
    kernel: str = check(kernel_spec(allow_empty=True), "3")
    stride: int = check(between(1, MAX_STRIDE, "an integer"), 1)


@dataclass(frozen=True)
class StageSpec:
    """Consecutive convs at one resolution; ``down`` is applied at the stage's start."""

    out_ch: int = check(between(1, MAX_CHANNELS, "an integer"))
    # 0: a bare downsampling step (pooling only)
    n_convs: int = check(between(0, MAX_CONVS, "an integer"), 2)
    down: Literal["none", "maxpool", "avgpool", "stride"] = "none"
    residual: bool = False
    name: str = ""  # default: stage1, stage2, ...
    kernel: str = check(kernel_spec(allow_empty=True), "")  # "": the network's kernel


@dataclass(frozen=True)
class NetworkSpec:
    """The base network that kernel plans rewrite. The input shape comes from the data."""

    stem: StemSpec = field(default_factory=StemSpec)
    stages: tuple[StageSpec, ...] = check(
        lambda v: None if len(v) <= MAX_STAGES else f"must list at most {MAX_STAGES} stages", ()
    )
    # every conv's kernel spec unless the stem, a stage or a plan says otherwise
    kernel: str = check(kernel_spec(), "3")
    norm: Literal["batch", "group", "none"] = "batch"
    norm_groups: int = check(between(1, MAX_CHANNELS, "an integer"), 8)
    act: Literal["relu", "gelu", "silu"] = "relu"
    padding: Literal["same", "valid"] = "same"
    dropout: float = check(below(1.0), 0.0)


# package.module:callable, or timm:NAME (kablate.nets.factory reads it)
FACTORY_FORM = re.compile(r"[A-Za-z_][\w.]*:[A-Za-z_][\w.]*")


def _factory(value: str) -> str | None:
    if FACTORY_FORM.fullmatch(value):
        return None
    return 'must name a factory as "package.module:callable" (e.g. "torchvision.models:resnet18")'


@dataclass(frozen=True)
class ModelSpec:
    """The user's own network (``[model]``), in place of ``[network]``: a factory that kablate
    imports and calls with ``arguments``. Importing runs the module's code: the only key of a
    sweep file that does. Plans address its Conv2d layers by module-path pattern or by role
    (`kablate.nets.rewrite`)."""

    factory: str = check(_factory)
    arguments: dict[str, Any] = field(default_factory=dict)  # keyword arguments of the factory


@dataclass(frozen=True)
class AugmentSpec:
    # random crop after zero-padding by this many pixels
    crop_padding: int = check(between(0, MAX_CROP_PADDING, "an integer"), 0)
    hflip: bool = False


@dataclass(frozen=True)
class RecipeSpec:
    """How every trial is trained. Identical for all variants of a sweep."""

    epochs: int = check(at_least(1), 10)
    max_steps: int = check(at_least(0), 0)  # 0: no cap; else stop after this many steps
    batch_size: int = check(between(1, MAX_BATCH, "an integer"), 64)
    optimizer: Literal["sgd", "adamw"] = "sgd"
    lr: float = check(between(1e-6, 10.0), 0.05)
    momentum: float = check(below(1.0), 0.9)
    weight_decay: float = check(between(0.0, 1.0), 5e-4)
    schedule: Literal["cosine", "step", "constant"] = "cosine"
    warmup_epochs: float = check(at_least(0, "a number"), 0.0)
    step_every: int = check(at_least(1), 10)  # epochs between decays for `step`
    step_gamma: float = check(between(0.0, 1.0), 0.1)
    label_smoothing: float = check(below(1.0), 0.0)
    augment: AugmentSpec = field(default_factory=AugmentSpec)
    # Which weights are scored (validation and test accuracy, the predictions): the last
    # epoch's, or the epoch with the best accuracy on the early-stopping fold (data.stop_size).
    test_from: Literal["best", "last"] = "last"


@dataclass(frozen=True)
class FilterSpec:
    """Drop variants before anything trains. 0 means no limit."""

    max_params: int = check(at_least(0), 0)
    max_macs: int = check(at_least(0), 0)
    max_act_mem: int = check(at_least(0), 0)  # bytes a training step keeps for backward
    min_rf: int = check(at_least(0), 0)
    max_rf: int = check(at_least(0), 0)
    equal_rf: bool = False  # keep only variants whose rf equals the baseline's


PICK_RULES = ("margin", "one-se")  # [pick] rule, `kablate report --rule`


@dataclass(frozen=True)
class PickSpec:
    """How the report picks the recommended plan (see `kablate.analysis.decide`).

    ``margin`` (the default rule): the cheapest plan by ``cost`` that costs less than the
    baseline and whose one-sided 95% lower bound of (plan − baseline) validation accuracy lies
    above −``margin`` percentage points; else the baseline. ``one-se``: the one-standard-error
    rule with ``within_se`` standard errors (seeds and images). ``kablate report --rule,
    --margin, --cost, --within-se`` override these.
    """

    rule: Literal[PICK_RULES] = "margin"
    margin: float = check(between(0.0, 50.0), 1.0)  # percentage points
    cost: Literal[COST_NAMES] = "macs"  # see kablate.spec.costs
    within_se: float = check(between(0.0, 10.0), 1.0)


def _input_side(value: tuple[int, ...]) -> str | None:
    if value == () or (len(value) == 2 and all(1 <= v <= MAX_SIDE for v in value)):
        return None
    return f"must be [height, width], each from 1 to {MAX_SIDE}, or [] for the data's size"


@dataclass(frozen=True)
class TargetSpec:
    """The deployment target that every latency (and the inference memory) is measured on.

    ``runtime`` is what the network will run on there: ``onnxruntime`` requires ONNX Runtime's
    figures (the `onnx` extra), ``torch`` takes them beside torch's where the extra is
    installed. 0 and [] mean: not stated (threads: ``--threads`` in `plan`, the workers'
    threads in `run`; batch: the recipe's; input: the data's)."""

    threads: int = check(between(0, MAX_THREADS, "an integer"), 0)
    batch: int = check(between(0, MAX_BATCH, "an integer"), 0)
    input: tuple[int, ...] = check(_input_side, ())
    runtime: Literal["torch", "onnxruntime"] = "torch"


@dataclass(frozen=True)
class SearchSpec:
    """A per-layer choice space that is searched instead of enumerated (`kablate.plans.space`,
    `kablate.trials.search`): NSGA-II trains ``budget`` of its plans with the first seed,
    maximising validation accuracy and minimising ``cost``; `kablate.spec.search` reads it."""

    choices: dict[str, tuple[str, ...]]  # layer group → the kernel specs it may take
    budget: int  # plans trained in the search (filtered and repeated proposals not counted)
    cost: Literal["macs", "params"] = "macs"  # minimised beside validation accuracy
    seed: int = 0  # the sampler's seed, not a training seed


@dataclass(frozen=True)
class HalvingSpec:
    """Successive halving inside trials (``[halving]``; `kablate.trials.halving`), off unless
    ``enabled``. A trial's validation accuracy is compared at the rungs, after ``first_epoch``
    × ``factor``^k epochs (k = 0, 1, ...; before the recipe's last epoch), with the other
    trials of its seed that reached the rung; one not among the best 1/``factor`` stops there."""

    enabled: bool = False
    first_epoch: int = check(at_least(1), 1)
    factor: int = check(between(2, 64, "an integer"), 3)


@dataclass(frozen=True)
class PlanSpec:
    """One explicit kernel plan: a name and a kernel spec per layer group."""

    name: str
    kernels: dict[str, str]
    line: str = ""  # where it came from, for messages: "plan[2]" or "grid[0]"


@dataclass(frozen=True)
class SweepSpec:
    """A whole sweep: what to vary, what to hold fixed, and how many seeds."""

    name: str
    source: str  # the sweep file, as given
    seeds: tuple[int, ...]
    data: DataSpec
    network: NetworkSpec
    recipe: RecipeSpec
    plans: tuple[PlanSpec, ...]  # explicit [[plan]] tables, in file order
    grids: tuple[dict[str, tuple[str, ...]], ...]
    filters: FilterSpec
    baseline: str = ""  # a plan name; default: the all-3×3 variant
    story: str = ""
    pick: PickSpec = field(default_factory=PickSpec)  # the selection rule's cost and tolerance
    racing: Literal["auto", "on", "off"] = "auto"  # retire dominated variants between seeds
    model: ModelSpec | None = None  # the user's own network; then `network` is unused
    target: TargetSpec = field(default_factory=TargetSpec)  # where latency is measured
    search: SearchSpec | None = None  # a choice space to search instead of plans to enumerate
    halving: HalvingSpec = field(default_factory=HalvingSpec)  # early stopping inside trials
    raw: dict = field(default_factory=dict, compare=False, repr=False)  # resolved TOML

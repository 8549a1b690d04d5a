"""The chosen variant, handed to the user's code (`kablate export`).

One JSON file per variant, ``RESULTS/handoff/<variant>.json``, that rebuilds the network
without the sweep file or the results folder:

- kablate's own network: the resolved ``network`` table and the kernel spec of every conv
  slot (``kernels``); `build_handoff` lays it out and builds it;
- the user's model (``[model]`` sweep): the factory, its keyword ``arguments`` and the
  ``rewrites`` (module path → kernel spec of each conv the plan changes). `apply_handoff`
  applies them to a model the user has built (with their own factory call), and
  `build_handoff` builds and rewrites it in one step.

Each file also carries the variant's costs as `kablate plan` counted them, so that a rebuilt
network can be checked against them (the tests do, with torch's own counters). Weights are not
included: the variant is retrained at full length by the user's own recipe (`kablate export
--onnx --seed S` can put a trial's scored weights into the ONNX file beside it).
"""

from __future__ import annotations

import json
from pathlib import Path

from torch import nn

from kablate import __version__
from kablate.errors import UsageError
from kablate.plans.grammar import KernelSpecError, parse_kernel

HANDOFF_DIR = "handoff"
COST_KEYS = ("params", "macs", "flops", "rf", "jump", "act_mem_bytes")


def handoff_dict(sweep, item, in_shape: tuple, n_classes: int, recommended: bool) -> dict:
    """The handoff of one costed variant (`kablate.costs.catalog.CostedVariant`)."""
    out = {
        "written_by": f"kablate {__version__}",
        "sweep": sweep.name,
        "variant": item.name,
        "variant_id": item.variant.id,
        "recommended": recommended,
        "input": list(in_shape),
        "n_classes": n_classes,
        "costs": {key: getattr(item.cost, key) for key in COST_KEYS},
    }
    if sweep.model is not None:
        out["model"] = {"factory": sweep.model.factory, "arguments": sweep.model.arguments}
        out["rewrites"] = dict(item.blueprint.changes)
    else:
        out["network"] = sweep.raw.get("network", {})
        out["kernels"] = {slot: str(spec) for slot, spec in item.variant.kernels.items()}
    return out


def read_handoff(path: str | Path) -> dict:
    """A handoff file, checked for the keys `build_handoff` needs.

    Raises:
        UsageError: not a readable handoff file.
    """
    try:
        handoff = json.loads(Path(path).read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise UsageError(f"{path} cannot be read as a kablate handoff file ({exc})") from None
    has_own = isinstance(handoff, dict) and {"network", "kernels"} <= handoff.keys()
    has_model = isinstance(handoff, dict) and {"model", "rewrites"} <= handoff.keys()
    if not (has_own or has_model) or "input" not in handoff:
        raise UsageError(
            f"{path} is not a kablate handoff file: it needs `input` and either `network` and "
            "`kernels` or `model` and `rewrites` (kablate export writes one)"
        )
    return handoff


def apply_handoff(model: nn.Module, path: str | Path) -> nn.Module:
    """Rewrite ``model`` (built by the user, e.g. ``resnet18(num_classes=10)``) in place as the
    handoff's variant; returns it. Shapes are kept; new convs are initialised as
    `kablate.nets.rewrite` says.

    Raises:
        UsageError: the file is for kablate's own network, or names a conv ``model`` lacks.
    """
    from kablate.nets.rewrite import rewrite_model
    from kablate.nets.sites import find_convs

    handoff = read_handoff(path)
    if "rewrites" not in handoff:
        raise UsageError(
            f"{path} describes kablate's own network, not a rewrite of yours: build it with "
            "kablate.nets.handoff.build_handoff"
        )
    paths = {site.path for site in find_convs(model)}
    missing = [p for p in handoff["rewrites"] if p not in paths]
    if missing:
        raise UsageError(
            f"{path} rewrites {', '.join(missing)}, which this model has no Conv2d at: build "
            f"it as the sweep did ({handoff['model']['factory']} with "
            f"{handoff['model']['arguments']})"
        )
    rewrite_model(model, _specs(handoff["rewrites"], path))
    return model


def build_handoff(path: str | Path) -> nn.Module:
    """The handoff's network, freshly initialised (the user's model: by importing and calling
    its factory, which runs that code)."""
    from kablate.nets.build import build_network
    from kablate.nets.layout import layout_network
    from kablate.nets.model_variant import model_variant
    from kablate.plans.expand import Variant
    from kablate.spec.fields import Where, read_table
    from kablate.spec.schema import NetworkSpec

    handoff = read_handoff(path)
    in_shape, n_classes = tuple(handoff["input"]), handoff["n_classes"]
    if "rewrites" in handoff:
        model, changes = handoff["model"], _specs(handoff["rewrites"], path)
        return build_network(
            model_variant(
                handoff["variant"],
                model["factory"],
                model["arguments"],
                in_shape,
                n_classes,
                changes,
            )
        )
    network = read_table(NetworkSpec, handoff["network"], Where(str(path), "network"))
    variant = Variant(handoff["variant"], {}, _specs(handoff["kernels"], path))
    return build_network(layout_network(network, variant, in_shape, n_classes))


def _specs(table: dict, path) -> dict:
    try:
        return {name: parse_kernel(text) for name, text in table.items()}
    except KernelSpecError as exc:
        raise UsageError(f"{path}: a kernel spec {exc}") from None

"""The data record, ``data.json``: what data a sweep used, read back as a `DataRecord`.

`kablate run` writes it from `PreparedData.manifest()` (data/prepare.py); every reader (the
analysis's evidence and class names, the card's data section, predictions.csv.gz, the
effective-receptive-field check, status) takes a `DataRecord` from `ResultsFolder.data`, never
the raw JSON. A field listed in `OPTIONAL` is absent from folders written before kablate kept
per-image predictions; every other key must be there, with its JSON type, or the folder is
refused with the file and the key named.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from kablate.errors import UsageError

OPTIONAL = ("classes", "labels")  # written since per-image predictions are kept
# each key's JSON type, as `json.loads` returns it
KINDS = {
    "source": str,
    "test_pool": str,
    "sizes": dict,
    "n_classes": int,
    "in_shape": list,
    "mean": list,
    "std": list,
    "indices_sha1": dict,
    "indices": dict,
    "classes": list,
    "labels": dict,
}
JSON_KINDS = {str: "string", int: "integer", list: "array", dict: "object"}


@dataclass(frozen=True)
class DataRecord:
    """The content of ``data.json``; splits are named ``train``, ``val``, ``test``, ``stop``."""

    source: str  # the dataset source's name (data/sources.py)
    test_pool: str  # where the test images came from, in words
    sizes: dict[str, int]  # images per split
    n_classes: int
    in_shape: tuple[int, int, int]  # C, H, W
    mean: tuple[float, ...]  # the training subset's normalisation, per channel
    std: tuple[float, ...]
    indices_sha1: dict[str, str]  # a short hash of each split's indices
    indices: dict[str, list[int]]  # each split's images, as indices into its source's pool
    classes: tuple[str, ...]  # class names; "0".."n-1" in an older folder
    # the true class of every scored image (val, test) in the order of ``indices``; None in a
    # folder written before kablate kept per-image predictions
    labels: dict[str, list[int]] | None

    @classmethod
    def from_dict(cls, content: dict, path: Path | str) -> DataRecord:
        """The record from the JSON object read from ``path`` (named in errors).

        Raises:
            UsageError: a key is missing or holds the wrong kind of value.
        """
        for key, kind in KINDS.items():
            if key not in content:
                if key in OPTIONAL:
                    continue
                raise UsageError(
                    f"{path} lacks `{key}`: it was not written by kablate run, or was edited; "
                    "kablate run with the same sweep file writes it again"
                )
            if not isinstance(content[key], kind) or isinstance(content[key], bool):
                raise UsageError(
                    f"{path} is damaged: `{key}` should be a JSON "
                    f"{JSON_KINDS[kind]}, but holds {content[key]!r:.60}; kablate run with the "
                    "same sweep file writes it again"
                )
        n_classes = content["n_classes"]
        return cls(
            source=content["source"],
            test_pool=content["test_pool"],
            sizes=dict(content["sizes"]),
            n_classes=n_classes,
            in_shape=tuple(content["in_shape"]),
            mean=tuple(content["mean"]),
            std=tuple(content["std"]),
            indices_sha1=dict(content["indices_sha1"]),
            indices=dict(content["indices"]),
            classes=tuple(str(c) for c in content.get("classes", range(n_classes))),
            labels=dict(content["labels"]) if "labels" in content else None,
        )

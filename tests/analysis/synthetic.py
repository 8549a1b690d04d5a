"""Synthetic data for analysis and report tests (invented data, for tests only): a plan.json
(`plan`), a partial sweep's trial rows (`rows`), their per-image evidence and a stem filter
bank with planted dead, duplicate and opposite filters (`planted_bank`).

`with_predictions` gives every finished row of a synthetic trials table the predictions that
reproduce its ``val_acc`` and ``test_acc`` exactly on ``n_images`` images: the first
round(acc · n) images of a per-trial shuffle are right, the others wrong.
"""

from __future__ import annotations

import zlib

import numpy as np

from kablate.results.data_record import DataRecord
from kablate.results.evidence import encode_predictions

N_IMAGES = 100
N_CLASSES = 10


def data_json(n_images: int = N_IMAGES, n_classes: int = N_CLASSES) -> DataRecord:
    """A data record (data.json) whose scored images are labelled 0, 1, …, n_classes - 1 in turn."""
    labels = [i % n_classes for i in range(n_images)]
    return DataRecord(
        source="synthetic",
        test_pool="held out",
        sizes={"train": 500, "val": n_images, "test": n_images},
        n_classes=n_classes,
        in_shape=(3, 8, 8),
        mean=(0.0, 0.0, 0.0),
        std=(1.0, 1.0, 1.0),
        indices_sha1={"train": "t", "val": "v", "test": "s"},
        indices={"val": list(range(n_images)), "test": list(range(n_images))},
        classes=tuple(str(c) for c in range(n_classes)),
        labels={"val": labels, "test": labels},
    )


def predictions_for(acc: float, key: str, n_images: int = N_IMAGES) -> str:
    labels = np.arange(n_images) % N_CLASSES
    rng = np.random.default_rng(zlib.crc32(key.encode()))
    order = rng.permutation(n_images)
    predicted = (labels + 1) % N_CLASSES
    right = order[: round(acc * n_images)]
    predicted[right] = labels[right]
    return encode_predictions(predicted)


def with_predictions(rows: list[dict], n_images: int = N_IMAGES) -> list[dict]:
    for row in rows:
        if row.get("status") == "done":
            key = f"{row['variant_id']}-s{row['seed']}"
            row["predictions"] = {
                split: predictions_for(row[f"{split}_acc"], f"{key}-{split}", n_images)
                for split in ("val", "test")
            }
    return rows


def plan(latency: bool = False) -> dict:
    def v(i, name, params, macs, rf):
        return {
            "id": f"v{i}",
            "name": name,
            "plan": {"body": name},
            "params": params,
            "macs": macs,
            "flops": 2 * macs,
            "rf": rf,
            "act_mem_bytes": 1000,
            "latency_ms": (1.0 + i) if latency else None,
            "axes": [],
            "grid": None,
        }

    return {
        "seeds": [0, 1, 2],
        "baseline": "v0",
        "variants": [
            v(0, "base", 100, 1000, 9),
            v(1, "cheap", 50, 400, 9),
            v(2, "big", 300, 5000, 15),
            v(3, "never", 10, 10, 5),
        ],
    }


VAL = {"v0": [0.90, 0.91, 0.92], "v1": [0.89, 0.91, 0.90], "v2": [0.93, 0.94]}


def rows(val: dict[str, list[float]] = VAL) -> list[dict]:
    """A partial sweep by default: big's seed 2 is still running, never has not started."""
    out = []
    for seed in (0, 1, 2):
        for vid, name in (("v0", "base"), ("v1", "cheap"), ("v2", "big"), ("v3", "never")):
            accs = val.get(vid, [])
            done = seed < len(accs)
            out.append(
                {
                    "variant": name,
                    "variant_id": vid,
                    "seed": seed,
                    "status": "done" if done else ("running" if vid == "v2" else "waiting"),
                    "val_acc": accs[seed] if done else None,
                    "test_acc": accs[seed] - 0.01 if done else None,
                    "train_seconds": 1.0 if done else None,
                    "samples_per_second": None,
                }
            )
    return out


def planted_bank() -> np.ndarray:
    """10 random 3×3 RGB filters, then 2 zero filters, 1 tiny one, a noisy copy of filter 0
    and the negative of filter 1: 15 filters."""
    rng = np.random.default_rng(7)
    bank = list(rng.normal(size=(10, 3, 3, 3)))
    bank += [np.zeros((3, 3, 3)), np.zeros((3, 3, 3)), 0.01 * bank[2]]
    bank += [bank[0] + 0.05 * rng.normal(size=(3, 3, 3)), -bank[1]]
    return np.stack(bank)

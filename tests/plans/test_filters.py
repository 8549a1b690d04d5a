"""Cost filters: each drops what it should, says why, and never drops the baseline."""

from __future__ import annotations

import pytest

from kablate.costs.catalog import build_catalog
from kablate.spec import load_sweep
from tests.conftest import write_sweep

SWEEP = """
[sweep]
name = "t"
seeds = [0]

[network]
from = "configs/tiny-net.toml"

[[plan]]
name = "all-3"
body = "3"

[[plan]]
name = "stem-5"
stem = "5"

[[plan]]
name = "stem-3d2"
stem = "3d2"

[[plan]]
name = "body-5"
body = "5"

[[plan]]
name = "body-1"
body = "1"

[filter]
"""


def plan_with(tmp_path, filters: str, baseline: str = ""):
    text = (
        SWEEP.replace("seeds = [0]", f'seeds = [0]\nbaseline = "{baseline}"') if baseline else SWEEP
    )
    sweep = load_sweep(write_sweep(tmp_path, text + filters, name="t"))
    catalog = build_catalog(sweep, in_shape=(1, 8, 8), n_classes=3)
    return catalog, {v.name: v.cost for v in catalog.variants}


def test_no_filter_keeps_everything(tmp_path):
    catalog, kept = plan_with(tmp_path, "")
    assert len(kept) == 5 and catalog.dropped == []


@pytest.mark.parametrize(
    ("filters", "key", "limit", "pick"),
    [
        ("max_params = {}", "params", "max", lambda c: c["stem-5"].params),
        ("max_macs = {}", "macs", "max", lambda c: c["stem-5"].macs),
        ("min_rf = {}", "rf", "min", lambda c: c["all-3"].rf),
        ("max_rf = {}", "rf", "max", lambda c: c["stem-5"].rf),
    ],
)
def test_limits_drop_exactly_the_variants_beyond_them(tmp_path, filters, key, limit, pick):
    _, everything = plan_with(tmp_path, "")
    value = pick(everything)
    catalog, kept = plan_with(tmp_path, filters.format(value))
    for name, cost in everything.items():
        beyond = getattr(cost, key) > value if limit == "max" else getattr(cost, key) < value
        assert (name not in kept) == (beyond and name != "all-3"), name
    for _, reason in catalog.dropped:
        assert f"{key if key != 'macs' else 'MACs'} " in reason


def test_equal_rf_keeps_variants_at_the_baselines_receptive_field(tmp_path):
    catalog, kept = plan_with(tmp_path, "equal_rf = true", baseline="stem-5")
    # a dense 5×5 stem and a dilated 3×3 stem both see 5×5: rf 1 + 4 + 2 + 1 + 2·2 = 12
    assert {name: cost.rf for name, cost in kept.items()} == {"stem-5": 12, "stem-3d2": 12}
    assert {item.name for item, _ in catalog.dropped} == {"all-3", "body-5", "body-1"}
    assert all("≠ the baseline's 12 (equal_rf)" in reason for _, reason in catalog.dropped)


def test_the_baseline_is_never_dropped(tmp_path):
    catalog, kept = plan_with(tmp_path, "max_macs = 1")
    assert list(kept) == ["all-3"]
    assert len(catalog.dropped) == 4


def test_max_act_mem_drops_the_variants_that_keep_more_for_backward(tmp_path):
    depthwise = '[[plan]]\nname = "body-dw"\nbody = "3:depthwise"\n\n[filter]\n'
    sweep = SWEEP.replace("[filter]\n", depthwise)
    path = write_sweep(tmp_path, sweep, name="t")
    everything = build_catalog(load_sweep(path), in_shape=(1, 8, 8), n_classes=3)
    mem = {v.name: v.cost.act_mem_bytes for v in everything.variants}
    limit = mem["all-3"]
    assert mem["body-dw"] > limit  # a depthwise pair keeps two maps per conv, not one
    path = write_sweep(tmp_path, sweep + f"max_act_mem = {limit}\n", name="t")
    catalog = build_catalog(load_sweep(path), in_shape=(1, 8, 8), n_classes=3)
    assert [(item.name, reason) for item, reason in catalog.dropped] == [
        ("body-dw", f"act mem {mem['body-dw']:,} B > max_act_mem {limit:,}")
    ]
    assert len(catalog.variants) == len(mem) - 1

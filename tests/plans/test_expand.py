"""Layer groups, grids, duplicate removal and the baseline, through real sweep files."""

from __future__ import annotations

import pytest

from kablate.costs.catalog import build_catalog
from kablate.errors import SweepError
from kablate.plans.expand import expand_plans, grid_cells, plan_text, read_plan_text
from kablate.plans.groups import list_slots, resolve_kernels
from kablate.spec import load_sweep
from tests.conftest import write_sweep
from tests.nets.tiny import tiny_network

HEAD = """
[sweep]
name = "t"
seeds = [0]

[network]
from = "configs/tiny-net.toml"
"""


def sweep_with(tmp_path, body):
    return load_sweep(write_sweep(tmp_path, HEAD + body, name="t"))


def test_slots_are_every_conv_in_forward_order():
    net = tiny_network(stages=((4, 2, "none"), (8, 1, "maxpool")))
    assert [s.name for s in list_slots(net)] == ["stem", "stage1.0", "stage1.1", "stage2.0"]


def test_a_more_specific_group_wins_whatever_the_order():
    net = tiny_network(stages=((4, 2, "none"), (8, 2, "maxpool")))
    kernels = resolve_kernels(
        net, {"stage1.1": "7", "conv3": "3:depthwise", "stage1": "5", "body": "9", "stem": "1"}
    )
    assert {k: str(v) for k, v in kernels.items()} == {
        "stem": "1",
        "stage1.0": "5",
        "stage1.1": "7",
        "stage2.0": "3:depthwise",  # conv3: the stem is conv0
        "stage2.1": "9",
    }


def test_an_unknown_group_is_named_with_a_suggestion(tmp_path):
    sweep = sweep_with(
        tmp_path, '[[plan]]\nname = "a"\nstage3 = "5"\n[[plan]]\nname = "b"\nstme = "5"\n'
    )
    with pytest.raises(SweepError, match=r"plan\[0\]\.stage3` is not a layer group"):
        expand_plans(sweep)


def test_a_bad_spec_names_the_group_and_the_text(tmp_path):
    sweep = sweep_with(tmp_path, '[[plan]]\nname = "a"\nstem = "5:wide"\n')
    with pytest.raises(SweepError, match=r'plan\[0\]\.stem` names form `wide`.*"5:wide"'):
        expand_plans(sweep)


def test_a_stride_is_the_stems_alone(tmp_path):
    net = tiny_network(stages=((4, 2, "none"), (8, 1, "maxpool")))
    for group in ("stem", "conv0"):
        assert resolve_kernels(net, {group: "11s4"})["stem"].stride == 4
    # a stage downsamples with its `down`; a stride inside it would break its shapes
    for group in ("body", "stage1", "stage1.0", "conv2"):
        sweep = sweep_with(tmp_path, f'[[plan]]\nname = "a"\n"{group}" = "3s2"\n')
        with pytest.raises(SweepError, match=rf'plan\[0\]\.{group}` gives stride 2 \("3s2"\)'):
            expand_plans(sweep)
    grid = sweep_with(tmp_path, '[[grid]]\nstem = ["3", "7s2"]\nbody = ["3", "5s2"]\n')
    with pytest.raises(SweepError, match=r"grid\[0\]\.body` gives stride 2.*only the stem"):
        expand_plans(grid)


def test_the_base_network_sets_strides_with_its_own_keys(tmp_path):
    path = write_sweep(tmp_path, HEAD + '[network.stem]\nkernel = "7s2"\n', name="t")
    with pytest.raises(SweepError, match=r"network\.stem\.kernel` gives a stride"):
        load_sweep(path)


def test_grid_is_the_cross_product_first_axis_slowest():
    cells = grid_cells({"stem": ("3", "5"), "body": ("3", "5:stack", "3d2")})
    assert len(cells) == 6
    assert cells[0] == {"stem": "3", "body": "3"} and cells[3] == {"stem": "5", "body": "3"}


def test_grid_cells_are_named_by_their_coordinates(tmp_path):
    sweep = sweep_with(tmp_path, '[[grid]]\nstem = ["3", "5"]\n"stage2.0" = ["3", "5:split"]\n')
    names = [v.name for v in expand_plans(sweep)]
    assert names == [
        "stem=3+stage2.0=3",
        "stem=3+stage2.0=5:split",
        "stem=5+stage2.0=3",
        "stem=5+stage2.0=5:split",
    ]


def test_identical_networks_are_one_variant_with_aliases(tmp_path):
    sweep = sweep_with(
        tmp_path,
        """
[[plan]]
name = "all-3"
body = "3"
[[plan]]
name = "spelled-out"
stage1 = "3"
stage2 = "3x3"
[[plan]]
name = "stack-of-one"
body = "3:stack"
[[grid]]
stem = ["3", "5"]
""",
    )
    catalog = build_catalog(sweep, in_shape=(1, 8, 8), n_classes=3)
    names = [v.name for v in catalog.variants]
    assert names == ["all-3", "stem=5"]
    # same specs merge at expansion; "3:stack" is one 3×3 conv, merged once laid out
    assert set(catalog.by_name("all-3").variant.aliases) == {
        "spelled-out",
        "stack-of-one",
        "stem=3",
    }


def test_bottleneck_ratios_that_give_the_same_width_are_one_variant(tmp_path):
    # the tiny network's stage2 has 16 channels: ratios 6 and 7 both reduce it to 2
    sweep = sweep_with(tmp_path, '[[grid]]\nstage2 = ["3:bottleneck/6", "3:bottleneck/7"]\n')
    catalog = build_catalog(sweep, in_shape=(1, 8, 8), n_classes=3)
    assert 16 // 6 == 16 // 7 == 2
    assert [v.name for v in catalog.variants] == ["stage2=3:bottleneck/6"]
    assert catalog.variants[0].variant.aliases == ("stage2=3:bottleneck/7",)


def test_a_grid_cell_that_repeats_a_plan_becomes_its_alias(tmp_path):
    # plan names cannot hold "=", so a cell name never collides with a plan name
    sweep = sweep_with(
        tmp_path, '[[plan]]\nname = "wide"\nstem = "5"\n[[grid]]\nstem = ["5", "7"]\n'
    )
    variants = expand_plans(sweep)
    assert [(v.name, v.aliases) for v in variants] == [("wide", ("stem=5",)), ("stem=7", ())]


def test_the_baseline_defaults_to_all_3x3_and_can_be_named(tmp_path):
    body = '[[plan]]\nname = "wide"\nstem = "7"\n[[plan]]\nname = "plain"\nbody = "3"\n'
    assert (
        build_catalog(sweep_with(tmp_path, body), in_shape=(1, 8, 8), n_classes=3).baseline.name
        == "plain"
    )
    named = load_sweep(
        write_sweep(
            tmp_path, HEAD.replace("seeds = [0]", 'seeds = [0]\nbaseline = "wide"') + body, "t"
        )
    )
    assert build_catalog(named, in_shape=(1, 8, 8), n_classes=3).baseline.name == "wide"


def test_the_all_3x3_baseline_is_found_when_merged_under_another_name(tmp_path):
    body = '[[plan]]\nname = "wide"\nstem = "7"\n[[plan]]\nname = "one-stack"\nbody = "3:stack"\n'
    body += '[[plan]]\nname = "plain"\nbody = "3"\n'
    catalog = build_catalog(sweep_with(tmp_path, body), in_shape=(1, 8, 8), n_classes=3)
    assert catalog.baseline.name == "one-stack"  # "plain" is its alias: the same layers
    assert catalog.baseline.variant.aliases == ("plain",)


def test_an_unknown_baseline_is_an_error(tmp_path):
    path = write_sweep(
        tmp_path,
        HEAD.replace("seeds = [0]", 'seeds = [0]\nbaseline = "wdie"')
        + '[[plan]]\nname = "wide"\nstem = "7"\n',
        "t",
    )
    with pytest.raises(SweepError, match="did you mean `wide`"):
        build_catalog(load_sweep(path), in_shape=(1, 8, 8), n_classes=3)


def test_a_plan_line_reads_back_as_the_plan():
    # the card reads a stem stride back from the plan column of variants.csv
    for plan in ({"stem": "11s4", "body": "3"}, {}, {"layer1.*.conv1": "5", "first-conv": "7s2"}):
        assert read_plan_text(plan_text(plan)) == plan
    assert read_plan_text("base") == {}  # a table that names the variant in place of a plan

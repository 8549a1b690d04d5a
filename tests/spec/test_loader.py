"""Sweep files: includes, overrides, and one clear error for anything wrong."""

from __future__ import annotations

import re

import pytest

from kablate.analysis.power import resolution_before
from kablate.errors import SweepError
from kablate.spec import load_sweep
from tests.conftest import REPO, TINY_SWEEP, write_sweep


def test_includes_resolve_and_inline_keys_override(tmp_path):
    path = write_sweep(
        tmp_path,
        TINY_SWEEP.replace(
            'from = "configs/tiny-recipe.toml"', 'from = "configs/tiny-recipe.toml"\nepochs = 5'
        ),
    )
    sweep = load_sweep(path)
    assert sweep.recipe.epochs == 5  # inline override
    assert sweep.recipe.lr == 0.05  # from the included recipe
    assert sweep.network.stem.out_ch == 8
    assert [s.out_ch for s in sweep.network.stages] == [8, 16]
    assert [p.name for p in sweep.plans] == ["all-3", "stem-5"]


def test_every_shipped_sweep_loads():
    paths = sorted((REPO / "sweeps").glob("*.toml"))
    assert paths, "sweeps/ ships no sweep files"
    for path in paths:
        assert load_sweep(path).name == path.stem


@pytest.mark.parametrize(
    ("old", "new", "key", "words"),
    [
        ("epochs = 5", "epoch = 5", "recipe.epoch", ["did you mean `epochs`"]),
        ("val_size = 100", "val_sise = 100", "data.val_sise", ["did you mean `val_size`"]),
        ("epochs = 5", "epochs = 0", "recipe.epochs", ["≥ 1", "got 0"]),
        ("epochs = 5", 'epochs = "five"', "recipe.epochs", ["an integer", '"five"']),
        ('source = "digits"', 'source = "digts"', "data.source", ["did you mean `digits`"]),
        ("seeds = [0, 1]", "seeds = [1, 1]", "sweep.seeds", ["distinct"]),
        ('[[plan]]\nname = "all-3"', '[[plans]]\nname = "all-3"', "plans", ["did you mean `plan`"]),
        ("[[plan]]", "[halving]\nfactor = 1\n[[plan]]", "halving.factor", ["2", "got 1"]),
        ("[[plan]]", "[halving]\nfirst_epoh = 1\n[[plan]]", "halving.first_epoh", ["first_epoch"]),
        (
            "[[plan]]",
            "[halving]\nenabled = true\nfirst_epoch = 5\n[[plan]]",
            "halving.first_epoch",
            ["no rung before the recipe's last epoch (5)"],
        ),
    ],
)
def test_bad_values_name_file_key_value_and_what_is_allowed(tmp_path, old, new, key, words):
    base = TINY_SWEEP.replace(
        'from = "configs/tiny-recipe.toml"', 'from = "configs/tiny-recipe.toml"\nepochs = 5'
    )
    assert old in base
    path = write_sweep(tmp_path, base.replace(old, new, 1))
    with pytest.raises(SweepError) as info:
        load_sweep(path)
    message = str(info.value)
    assert str(path) in message
    assert f"`{key}`" in message
    for word in words:
        assert word in message


def test_syntax_error_names_the_line(tmp_path):
    path = write_sweep(tmp_path, TINY_SWEEP.replace("seeds = [0, 1]", "seeds = = [0, 1]"))
    with pytest.raises(SweepError) as info:
        load_sweep(path)
    assert info.value.line == 4
    assert f"{path}, line 4" in str(info.value)


def test_missing_include_says_where_it_looked(tmp_path):
    path = write_sweep(tmp_path, TINY_SWEEP.replace("tiny-net.toml", "nowhere.toml"))
    with pytest.raises(SweepError, match="nowhere.toml.*not found"):
        load_sweep(path)


def test_error_inside_an_included_file_names_that_file(tmp_path):
    path = write_sweep(tmp_path, TINY_SWEEP)
    (tmp_path / "configs" / "tiny-recipe.toml").write_text("epochs = 2\nbatch_sise = 3\n")
    with pytest.raises(SweepError) as info:
        load_sweep(path)
    assert "tiny-recipe.toml" in str(info.value)
    assert "did you mean `batch_size`" in str(info.value)


@pytest.mark.parametrize(
    ("inline", "key"),
    [
        ('kernel = "3:wide"', "network.kernel"),
        ('kernel = ""', "network.kernel"),
        ('[network.stem]\nkernel = "4:stack"', "network.stem.kernel"),
    ],
)
def test_a_bad_base_kernel_is_named_under_its_own_key(tmp_path, inline, key):
    # not under the first plan that happens to meet it
    text = TINY_SWEEP.replace(
        'from = "configs/tiny-net.toml"', f'from = "configs/tiny-net.toml"\n{inline}'
    )
    path = write_sweep(tmp_path, text)
    with pytest.raises(SweepError) as info:
        load_sweep(path)
    message = str(info.value)
    assert str(path) in message and f"`{key}`" in message and "plan[" not in message


def test_a_bad_stage_kernel_in_an_included_network_names_that_file(tmp_path):
    path = write_sweep(tmp_path, TINY_SWEEP)
    net = tmp_path / "configs" / "tiny-net.toml"
    net.write_text(net.read_text() + 'kernel = "5x1:split"\n')  # lands in the last stage
    with pytest.raises(SweepError) as info:
        load_sweep(path)
    message = str(info.value)
    assert "tiny-net.toml" in message and "`stages[1].kernel`" in message
    assert "both sizes ≥ 2" in message and '"5x1:split"' in message


STORY_RESOLUTION = re.compile(
    r"([\d,]+) validation images resolve ([\d.]+) pp at (\d+)% disagreement"
)


@pytest.mark.parametrize("path", sorted((REPO / "sweeps").glob("*.toml")), ids=lambda p: p.stem)
def test_every_shipped_story_says_what_its_validation_images_can_resolve(path):
    # The resolution is the normal-approximation sample-size formula, (z₀.₉₅ + z₀.₈₀)·√(d/n)
    # (NIST/SEMATECH e-Handbook §7.2.2.2), recomputed here from the sweep's own val_size.
    sweep = load_sweep(path)
    found = STORY_RESOLUTION.search(sweep.story)
    assert found, f"{path.name}: the story does not say what its validation images resolve"
    n, claimed, rate = int(found[1].replace(",", "")), float(found[2]), int(found[3]) / 100
    assert n == sweep.data.val_size
    assert claimed == round(100 * resolution_before(n, rate).smallest, 2)
    # ... and whether that decides the sweep's question at its margin.
    margin = sweep.pick.margin
    if claimed <= margin:
        assert f"enough for the {margin:g} pp margin" in sweep.story
    else:
        assert "undecided" in sweep.story or "cannot" in sweep.story, sweep.story

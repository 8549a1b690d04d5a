"""Caps on everything that allocates or names a file, checked when a sweep is loaded."""

from __future__ import annotations

import pytest

from kablate.costs.catalog import build_catalog
from kablate.errors import SweepError
from kablate.plans import expand
from kablate.spec import load_sweep
from kablate.spec.bounds import MAX_DEPTH, MAX_GRID_CELLS, MAX_SEED
from tests.conftest import TINY_SWEEP, write_sweep

RECIPE = 'from = "configs/tiny-recipe.toml"'
NETWORK = 'from = "configs/tiny-net.toml"'


def tiny_with(tmp_path, old: str, new: str):
    assert old in TINY_SWEEP
    return write_sweep(tmp_path, TINY_SWEEP.replace(old, new, 1))


@pytest.mark.parametrize(
    ("old", "new", "key", "words"),
    [
        (
            'name = "tiny"',
            f'name = "{"n" * 300}"',
            "sweep.name",
            ["at most 100 characters long", "has 300)"],
        ),
        ("seeds = [0, 1]", "seeds = [0, 3000000000000]", "sweep.seeds", [str(MAX_SEED)]),
        ("seeds = [0, 1]", "seeds = [0, -1]", "sweep.seeds", ["from 0"]),
        ("val_size = 100", "val_size = 100\nsplit_seed = 2147483648", "data.split_seed", []),
        (RECIPE, f"{RECIPE}\nwarmup_epochs = inf", "recipe.warmup_epochs", ["finite", "inf"]),
        (RECIPE, f"{RECIPE}\nlr = nan", "recipe.lr", ["finite"]),
        (RECIPE, f"{RECIPE}\nlr = {10**400}", "recipe.lr", ["finite"]),
        (RECIPE, f"{RECIPE}\nbatch_size = 1000000000", "recipe.batch_size", ["65536"]),
        (
            RECIPE,
            f"{RECIPE}\n[recipe.augment]\ncrop_padding = 100000",
            "recipe.augment.crop_padding",
            ["64"],
        ),
        (
            NETWORK,
            f"{NETWORK}\n[network.stem]\nout_ch = 1000000000",
            "network.stem.out_ch",
            ["4096"],
        ),
        (NETWORK, f"{NETWORK}\n[network.stem]\nstride = 100000", "network.stem.stride", ["64"]),
        (NETWORK, f"{NETWORK}\nnorm_groups = 100000", "network.norm_groups", ["4096"]),
        (NETWORK, f'{NETWORK}\nkernel = "10001"', "network.kernel", ["at most 255"]),
        (NETWORK, f'{NETWORK}\nkernel = "3d100000"', "network.kernel", ["at most 255"]),
        (NETWORK, f'{NETWORK}\nkernel = "{"7" * 40}"', "network.kernel", ["at most 255"]),
        (NETWORK, f'{NETWORK}\nkernel = "{"9" * 5000}"', "network.kernel", ["at most 255"]),
    ],
)
def test_a_value_past_its_cap_is_refused_at_load_time(tmp_path, old, new, key, words):
    path = tiny_with(tmp_path, old, new)
    with pytest.raises(SweepError) as info:
        load_sweep(path)
    message = str(info.value)
    assert str(path) in message and f"`{key}`" in message, message
    assert "\n" not in message and len(message) < 500
    for word in words:
        assert word in message


def test_values_at_the_caps_load(tmp_path):
    path = tiny_with(tmp_path, "seeds = [0, 1]", f"seeds = [0, {MAX_SEED}]")
    assert load_sweep(path).seeds == (0, MAX_SEED)
    path = tiny_with(tmp_path, RECIPE, f"{RECIPE}\nbatch_size = 65536")
    assert load_sweep(path).recipe.batch_size == 65536


def test_too_many_convs_or_stages_are_refused(tmp_path):
    path = write_sweep(tmp_path, TINY_SWEEP)
    net = tmp_path / "configs" / "tiny-net.toml"
    net.write_text(net.read_text().replace("n_convs = 1", "n_convs = 1000000", 1))
    with pytest.raises(SweepError, match=r"`stages\[0\].n_convs` must be an integer from 0 to 64"):
        load_sweep(path)
    net.write_text(net.read_text().replace("n_convs = 1000000", "n_convs = 1"))
    net.write_text(net.read_text() + "[[stages]]\nout_ch = 8\nn_convs = 0\n" * 70)
    with pytest.raises(SweepError, match=r"`stages` must list at most 64 stages"):
        load_sweep(path)


@pytest.mark.parametrize(
    "text",
    [
        "a = " + "[" * 5000 + "]" * 5000,  # inline arrays: tomllib recurses
        "a = " + "{b = " * 5000 + "1" + "}" * 5000,  # inline tables
        "[" + ".".join(["a"] * 5000) + "]\nb = 1\n",  # a dotted header: no recursion at all
        f"[{'.'.join(['a'] * (MAX_DEPTH + 1))}]\nb = 1\n",  # just past the cap
    ],
)
def test_deep_nesting_is_refused_by_name(tmp_path, text):
    path = tmp_path / "sweep.toml"
    path.write_text(text)
    with pytest.raises(SweepError) as info:
        load_sweep(path)
    assert str(path) in str(info.value) and ": nests " in str(info.value)


def test_an_integer_too_long_for_python_is_a_toml_error(tmp_path):
    path = tiny_with(tmp_path, "val_size = 100", "val_size = " + "1" * 5000)
    with pytest.raises(SweepError, match=r"is not valid TOML: Exceeds the limit"):
        load_sweep(path)


def test_a_grid_with_too_many_cells_is_refused_before_any_is_built(tmp_path, monkeypatch):
    monkeypatch.setattr(expand, "grid_cells", lambda grid: pytest.fail("a cell was built"))
    axes = "\n".join(f'"conv{i}" = ["3", "5", "7", "9"]' for i in range(3))
    path = write_sweep(tmp_path, TINY_SWEEP + f"\n[[grid]]\n{axes}\nstem = {list('3579') * 50}\n")
    with pytest.raises(SweepError) as info:
        load_sweep(path)
    assert "`grid` has 12,800 cells" in str(info.value)
    assert f"{MAX_GRID_CELLS:,}" in str(info.value)


def test_a_misspelt_grid_axis_is_named_before_any_cell_is_built(tmp_path, monkeypatch):
    axes = "stem = [" + ", ".join(f'"{k}"' for k in (1, 3, 5, 7)) + ']\nstgae1 = ["3", "5"]'
    sweep = load_sweep(write_sweep(tmp_path, TINY_SWEEP + f"\n[[grid]]\n{axes}\n"))
    monkeypatch.setattr(expand, "grid_cells", lambda grid: pytest.fail("a cell was built"))
    with pytest.raises(SweepError) as info:
        expand.expand_plans(sweep)
    assert "`grid[0].stgae1`" in str(info.value) and "did you mean `stage1`" in str(info.value)


@pytest.mark.parametrize("padding", [8, 64])
def test_crop_padding_must_be_smaller_than_the_image(tmp_path, padding):
    # digits are 8×8: a crop after padding by 8 could be all padding
    path = tiny_with(tmp_path, RECIPE, f"{RECIPE}\n[recipe.augment]\ncrop_padding = {padding}")
    with pytest.raises(
        SweepError, match=r"`recipe.augment.crop_padding` must be smaller .*at most 7"
    ):
        build_catalog(load_sweep(path))
    path = tiny_with(tmp_path, RECIPE, f"{RECIPE}\n[recipe.augment]\ncrop_padding = 7")
    assert build_catalog(load_sweep(path)).variants


def test_the_readme_lists_every_cap():
    from kablate.spec import bounds
    from tests.conftest import REPO

    text = (REPO / "sweeps" / "README.md").read_text()
    section = text.split("## Caps", 1)[1].split("\n## ", 1)[0]
    caps = {name: value for name, value in vars(bounds).items() if name.startswith("MAX_")}
    caps.pop("MAX_SPEC_DIGITS")  # how MAX_KERNEL is enforced, not a cap of its own
    for name, value in caps.items():
        assert str(value) in section or f"{value:,}" in section, name

"""The declarative validator every sweep table goes through, on tables parsed by Python's
tomllib from TOML text: TOML booleans are not integers, TOML's inf and nan are refused, and
each refusal names the file, the key path, the value and what is allowed."""

from __future__ import annotations

import tomllib
from dataclasses import dataclass, field
from typing import Literal

import pytest

from kablate.errors import SweepError
from kablate.spec.fields import Where, at_least, between, check, describe, read_table


@dataclass(frozen=True)
class Inner:
    kernel: int = check(at_least(1), 3)


@dataclass(frozen=True)
class Table:
    name: str
    epochs: int = check(at_least(1), 10)
    lr: float = check(between(0.0, 1.0), 0.1)
    shuffle: bool = True
    optimizer: Literal["sgd", "adamw"] = "sgd"
    sizes: tuple[int, ...] = ()
    stage: Inner = field(default_factory=Inner)
    note: str | None = None


def read(text: str) -> Table:
    return read_table(Table, tomllib.loads(text), Where("sweeps/x.toml").key("recipe"))


def refusal(text: str) -> str:
    with pytest.raises(SweepError) as caught:
        read(text)
    return str(caught.value)


def test_a_good_table_reads_with_its_defaults_and_types():
    t = read('name = "a"\nepochs = 3\nlr = 1\nsizes = [1, 2]\n[stage]\nkernel = 5\n')
    assert t == Table("a", 3, 1.0, True, "sgd", (1, 2), Inner(5), None)
    assert isinstance(t.lr, float)  # a TOML integer where a number is asked for


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("epochs = 3", "`recipe.name` is required but missing"),
        ('name = "a"\nepochs = true', "`recipe.epochs` must be an integer, but got True"),
        ('name = "a"\nshuffle = 1', "`recipe.shuffle` must be true or false, but got 1"),
        ('name = "a"\nlr = inf', "`recipe.lr` must be a finite number, but got inf"),
        ('name = "a"\nepochs = 0', "`recipe.epochs` must be an integer ≥ 1, but got 0"),
        ('name = "a"\nlr = 1.5', "`recipe.lr` must be a number from 0 to 1, but got 1.5"),
        ('name = "a"\nsizes = [1, "2"]', '`recipe.sizes[1]` must be an integer, but got "2"'),
        ('name = "a"\n[stage]\nkernel = 0', "`recipe.stage.kernel` must be an integer ≥ 1"),
    ],
)
def test_each_refusal_names_the_file_the_key_path_and_what_is_allowed(text, message):
    got = refusal(text)
    assert got.startswith("sweeps/x.toml: ") and message in got


def test_a_misspelt_key_or_choice_gets_a_did_you_mean():
    got = refusal('name = "a"\nepcohs = 3')
    assert "`recipe.epcohs` is not a known key; did you mean `epochs`?" in got
    assert "(allowed here: epochs, lr, name, note, optimizer, shuffle, sizes, stage)" in got
    got = refusal('name = "a"\noptimizer = "adamv"')
    assert '`recipe.optimizer` must be one of "sgd", "adamw", but got "adamv"' in got
    assert "did you mean `adamw`?" in got


def test_a_bad_value_is_shown_on_one_short_line():
    assert describe("x" * 100) == '"' + "x" * 56 + "..."
    assert describe("a\nb") == "'a\\nb'"  # not printable: repr, one line

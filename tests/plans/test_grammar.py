"""The kernel-spec grammar: sizes, dilation, the five forms and the messages for bad specs."""

from __future__ import annotations

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from kablate.plans.grammar import KernelSpec, KernelSpecError, parse_kernel, stack_depth


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        ("3", KernelSpec(3, 3)),
        ("5x3", KernelSpec(5, 3)),
        ("5×3", KernelSpec(5, 3)),
        (" 4 ", KernelSpec(4, 4)),
        ("3d2", KernelSpec(3, 3, 2)),
        ("7:stack", KernelSpec(7, 7, 1, "stack")),
        ("5x3:split", KernelSpec(5, 3, 1, "split")),
        ("3d2:depthwise", KernelSpec(3, 3, 2, "depthwise")),
        ("3:bottleneck", KernelSpec(3, 3, 1, "bottleneck", 4)),
        ("3:bottleneck/2", KernelSpec(3, 3, 1, "bottleneck", 2)),
        ("1d3", KernelSpec(1, 1, 1)),  # dilation means nothing on a 1×1: one spelling
        ("11s4", KernelSpec(11, 11, stride=4)),
        ("7s2:stack", KernelSpec(7, 7, 1, "stack", stride=2)),
        ("3d2s2", KernelSpec(3, 3, 2, stride=2)),
        ("5x3s2:split", KernelSpec(5, 3, 1, "split", stride=2)),
    ],
)
def test_specs_parse(text, expected):
    assert parse_kernel(text) == expected


@pytest.mark.parametrize(
    ("text", "phrase"),
    [
        ("", "must be a kernel spec"),
        ("3:wide", "names form `wide`"),
        ("0", "≥ 1"),
        ("3d0", "≥ 1"),
        ("4:stack", "square odd kernel"),
        ("5x3:stack", "square odd kernel"),
        ("5x1:split", "both sizes ≥ 2"),
        ("3/2", "must be a kernel spec"),
        ("3:depthwise/2", "only the bottleneck form"),
        ("3:bottleneck/0", "ratio ≥ 1"),
        ("3s0", "stride is at least 1 and at most 64"),
        ("3s65", "stride is at least 1 and at most 64"),
        ("3s2d2", "must be a kernel spec"),  # one order: size, dilation, stride, form
    ],
)
def test_bad_specs_say_what_is_allowed(text, phrase):
    with pytest.raises(KernelSpecError, match=phrase):
        parse_kernel(text)


def test_a_misspelt_form_gets_a_did_you_mean():
    with pytest.raises(KernelSpecError) as caught:
        parse_kernel("5:splt")
    assert str(caught.value) == (
        "names form `splt`; did you mean `split`? "
        "(the forms are dense, stack, split, depthwise, bottleneck)"
    )
    with pytest.raises(KernelSpecError) as caught:
        parse_kernel("3:wide")  # nothing close: no guess
    assert "did you mean" not in str(caught.value)


def test_stack_depth_keeps_the_receptive_field():
    # (k − 1)/2 stacked 3×3 convs see k×k (Simonyan & Zisserman 2014, section 2.3)
    for k in (3, 5, 7, 9, 11):
        spec = parse_kernel(f"{k}:stack")
        assert 1 + 2 * stack_depth(spec) == k == spec.extent[0]


def test_extent_of_a_dilated_kernel():
    # d·(k − 1) + 1 (Dumoulin & Visin 2016, section 5.1)
    assert parse_kernel("3d2").extent == (5, 5)
    assert parse_kernel("5x3d3").extent == (13, 7)


specs = st.builds(
    KernelSpec,
    kh=st.integers(2, 9),
    kw=st.integers(2, 9),
    dilation=st.integers(1, 3),
    form=st.sampled_from(["dense", "split", "depthwise", "bottleneck"]),
    ratio=st.just(4),
    stride=st.sampled_from([0, 1, 2, 4, 64]),
)


@settings(max_examples=60, deadline=None)
@given(specs)
def test_written_specs_read_back_the_same(spec):
    assert parse_kernel(str(spec)) == spec


@pytest.mark.parametrize("text", ["３", "٣", "５x3", "3d٢", "3:bottleneck/４"])
def test_digits_of_other_scripts_are_not_kernel_sizes(text):
    assert int("３") == int("٣") == 3  # int() reads them; the grammar must not
    with pytest.raises(KernelSpecError, match="must be a kernel spec"):
        parse_kernel(text)


@pytest.mark.parametrize("text", ["256", "10001", "3d256", "3x" + "9" * 40, "0" * 50 + "3000"])
def test_sizes_and_dilations_past_the_cap_are_refused(text):
    with pytest.raises(KernelSpecError, match="at most 255"):
        parse_kernel(text)


def test_sizes_at_the_cap_and_leading_zeros_parse():
    assert parse_kernel("255d255") == KernelSpec(255, 255, 255)
    assert parse_kernel("0" * 50 + "3") == KernelSpec(3, 3)


def test_a_stride_is_written_back_and_only_when_given():
    assert str(parse_kernel("11s4")) == "11s4"
    assert str(parse_kernel("11")) == "11"  # no stride given: the key of old plans is unchanged
    assert not parse_kernel("3s2").is_plain_3x3 and parse_kernel("3").is_plain_3x3

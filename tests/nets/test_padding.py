"""Output sizes and padding, against PyTorch's documented formula and torch itself."""

from __future__ import annotations

import itertools
import math

import torch
import torch.nn.functional as F

from kablate.nets.padding import conv_out_size, get_padding, is_symmetric


def documented_out(size: int, kernel: int, stride: int, pad: int, dilation: int) -> int:
    # torch.nn.Conv2d documentation, "Shape" section:
    # H_out = floor((H_in + 2·padding − dilation·(kernel_size − 1) − 1) / stride + 1)
    return math.floor((size + 2 * pad - dilation * (kernel - 1) - 1) / stride + 1)


def test_conv_out_size_matches_the_pytorch_docs_and_torch():
    checked = 0
    for size, k, s, p, d in itertools.product(
        (5, 8, 13), (1, 2, 3, 5), (1, 2, 3), (0, 1, 2), (1, 2)
    ):
        expected = documented_out(size, k, s, p, d)
        assert conv_out_size(size, k, s, 2 * p, d) == expected, (size, k, s, p, d)
        if expected >= 1:
            out = F.conv2d(torch.zeros(1, 1, size, size), torch.zeros(1, 1, k, k), None, s, p, d)
            assert out.shape[-1] == expected  # torch itself
            checked += 1
    assert checked > 150


def test_dumoulin_visin_relationships():
    # Dumoulin & Visin 2016, "A guide to convolution arithmetic for deep learning":
    # relationship 6, o = floor((i + 2p − k) / s) + 1, and section 5.1, a dilated kernel acts
    # as one of size k + (k − 1)(d − 1).
    for i, k, s, p, d in itertools.product((6, 7, 11), (2, 3, 4), (1, 2), (0, 1), (1, 3)):
        k_hat = k + (k - 1) * (d - 1)
        if i + 2 * p >= k_hat:
            assert conv_out_size(i, k, s, 2 * p, d) == (i + 2 * p - k_hat) // s + 1
    # their worked figures (captions from memory; torch checks each one too):
    # 2.1 i = 4, k = 3 → o = 2; 2.2 i = 5, k = 4, p = 2 → o = 6; 2.6 i = 5, k = 3, s = 2, p = 1
    # → o = 3; 5.1 (dilated) i = 7, k = 3, d = 2 → o = 3
    for i, k, s, p, d, o in (
        (4, 3, 1, 0, 1, 2),
        (5, 4, 1, 2, 1, 6),
        (5, 3, 2, 1, 1, 3),
        (7, 3, 1, 0, 2, 3),
    ):
        assert conv_out_size(i, k, s, 2 * p, d) == o
        out = F.conv2d(torch.zeros(1, 1, i, i), torch.zeros(1, 1, k, k), None, s, p, d)
        assert out.shape[-2:] == (o, o)


def test_same_padding_keeps_the_size_for_every_kernel_including_even_ones():
    for k, d in itertools.product(range(1, 10), (1, 2, 3)):
        pad = get_padding((k, k), (d, d), "same")
        top, bottom, left, right = pad
        assert conv_out_size(9, k, 1, top + bottom, d) == 9
        assert is_symmetric(pad) == (d * (k - 1) % 2 == 0)
        assert bottom - top in (0, 1) and right - left in (0, 1)  # the extra pixel: bottom/right
        # against torch: F.pad order is (left, right, top, bottom)
        x = F.pad(torch.zeros(1, 1, 9, 9), (left, right, top, bottom))
        assert F.conv2d(x, torch.zeros(1, 1, k, k), dilation=d).shape[-2:] == (9, 9)


def test_valid_padding_shrinks_by_the_extent_minus_one():
    assert get_padding((5, 3), (1, 2), "valid") == (0, 0, 0, 0)
    assert conv_out_size(8, 5, 1, 0, 1) == 4
    assert conv_out_size(8, 3, 1, 0, 2) == 4


def test_facts_of_the_trade_about_output_sizes():
    # common practice: a kernel as large as its input gives 1×1 under valid padding
    for size in (3, 8, 17):
        assert conv_out_size(size, size, 1, 0) == 1
    # common practice: a 1×1 kernel keeps the resolution
    for size in (1, 8, 17):
        assert conv_out_size(size, 1, 1, 0) == size

"""The one place that decides padding and output sizes, so that nets, costs and docs agree."""

from __future__ import annotations

Pair = tuple[int, int]
Quad = tuple[int, int, int, int]


def get_padding(kernel: Pair, dilation: Pair, policy: str) -> Quad:
    """Padding (top, bottom, left, right) for a kernel under ``same`` or ``valid``.

    ``same`` pads a total of d·(k−1) per axis so that a stride-1 conv keeps the size. When that
    total is odd (an even kernel), the extra pixel goes to the bottom/right, so the output is
    shifted by half a pixel.
    """
    if policy == "valid":
        return (0, 0, 0, 0)
    return split_padding(dilation[0] * (kernel[0] - 1), dilation[1] * (kernel[1] - 1))


def split_padding(total_h: int, total_w: int) -> Quad:
    """Total paddings per axis as (top, bottom, left, right): halves, the odd pixel at the
    bottom/right."""
    return (total_h // 2, total_h - total_h // 2, total_w // 2, total_w - total_w // 2)


def is_symmetric(padding: Quad) -> bool:
    return padding[0] == padding[1] and padding[2] == padding[3]


def conv_out_size(size: int, kernel: int, stride: int, pad_total: int, dilation: int = 1) -> int:
    """Output length of a conv or pooling window along one axis.

    The formula of PyTorch's ``torch.nn.Conv2d`` documentation (also Dumoulin & Visin 2016):
    ``floor((size + pad_total − dilation·(kernel − 1) − 1) / stride) + 1``. It can be ≤ 0, which
    the caller reports as a map smaller than 1×1.
    """
    return (size + pad_total - dilation * (kernel - 1) - 1) // stride + 1

"""Networks: lay out a variant as data, then build the torch module from that layout."""

from kablate.nets.build import KernelNet, build_network
from kablate.nets.layout import Block, Layer, Layout, layout_network
from kablate.nets.padding import conv_out_size, get_padding

__all__ = [
    "Block",
    "KernelNet",
    "Layer",
    "Layout",
    "build_network",
    "conv_out_size",
    "get_padding",
    "layout_network",
]

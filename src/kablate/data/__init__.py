"""Data: sources, splits and in-memory batching."""

from kablate.data.prepare import PreparedData, Split, prepare_data
from kablate.data.sources import SOURCES, ImageSet, describe_source

__all__ = ["SOURCES", "ImageSet", "PreparedData", "Split", "describe_source", "prepare_data"]

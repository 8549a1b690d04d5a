"""How a trial's predictions are stored: the class indices as little-endian uint16,
zlib-compressed, then base64 (the format the module docstring states), read back here with the
standard library and numpy alone."""

from __future__ import annotations

import base64
import struct
import zlib

import numpy as np
import pytest

from kablate.results.evidence import MAX_CLASSES, decode_predictions, encode_predictions


def test_the_stored_string_is_base64_of_zlib_of_little_endian_uint16():
    predicted = np.array([0, 1, 9, 300, 65535])
    text = encode_predictions(predicted)
    raw = zlib.decompress(base64.b64decode(text))
    assert struct.unpack("<5H", raw) == (0, 1, 9, 300, 65535)
    assert text.isascii()


def test_predictions_round_trip_as_int64():
    rng = np.random.default_rng(0)
    predicted = rng.integers(0, 1000, size=5000)
    back = decode_predictions(encode_predictions(predicted))
    assert back.dtype == np.int64 and np.array_equal(back, predicted)
    assert decode_predictions(encode_predictions(np.array([], dtype=np.int64))).size == 0


@pytest.mark.parametrize("bad", [-1, MAX_CLASSES])
def test_a_class_index_uint16_cannot_hold_is_refused(bad):
    with pytest.raises(ValueError, match="class indices must lie in"):
        encode_predictions(np.array([0, bad]))

"""Frames to PNG: lossless, the right mode and channel order, read back by Pillow's decoder."""
import io

import numpy as np
import pytest
from PIL import Image

from geotween.service.imaging import encode_png, to_uint8


@pytest.mark.parametrize("channels, mode", [(1, "L"), (3, "RGB")])
def test_png_frames_decode_to_their_own_8_bit_pixels(channels, mode):
    rng = np.random.default_rng(7)
    frame = rng.random((64, 48, channels), dtype=np.float32)  # noise: no run or match to hide a fault
    frame[:8] = 0.25  # and a flat band
    png = encode_png(frame)
    assert png[:8] == b"\x89PNG\r\n\x1a\n"  # the PNG signature (PNG specification, section 5.2)
    img = Image.open(io.BytesIO(png))
    assert img.mode == mode and img.size == (48, 64)
    want = to_uint8(frame)
    assert np.array_equal(np.asarray(img), want)


def test_colour_channels_keep_their_order():
    frame = np.zeros((16, 16, 3), np.float32)
    frame[..., 0] = 1.0  # pure red
    got = np.asarray(Image.open(io.BytesIO(encode_png(frame))))
    assert got[0, 0].tolist() == [255, 0, 0]


def test_values_outside_the_unit_range_are_clipped():
    frame = np.array([[[-0.5], [1.5]]], np.float32)
    assert np.asarray(Image.open(io.BytesIO(encode_png(frame)))).tolist() == [[0, 255]]

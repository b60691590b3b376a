"""Linear inputs: 16-bit linear TIFF (written here with tifffile) and camera RAW / DNG (read by LibRaw via rawpy).

The DNG files are made here with tifffile: a colour-filter-array image (photometric 32803) with the DNG
tags LibRaw needs (Adobe DNG Specification 1.4: DNGVersion 50706, CFARepeatPatternDim 33421, CFAPattern
33422, BlackLevel 50714, WhiteLevel 50717, ColorMatrix1 50721).
"""

from __future__ import annotations

import io
import time

import numpy as np
import pytest

from physics.errors import InputError
from physics.imageio import Photo, box_mean_linear, load_image

tifffile = pytest.importorskip("tifffile")
rawpy = pytest.importorskip("rawpy")

BLACK, WHITE = 64, 4095


def tiff16(a, **kw) -> bytes:
    buf = io.BytesIO()
    tifffile.imwrite(buf, a, photometric="rgb", **kw)
    return buf.getvalue()


def dng(cfa: np.ndarray, black=BLACK, white=WHITE, width=None, height=None) -> bytes:
    """A minimal DNG of an RGGB colour-filter-array image (uint16)."""
    identity = (1, 1, 0, 1, 0, 1, 0, 1, 1, 1, 0, 1, 0, 1, 0, 1, 1, 1)
    extratags = [(50706, "B", 4, (1, 4, 0, 0), True), (50707, "B", 4, (1, 1, 0, 0), True),
                 (50708, "s", 0, "Invented camera", True), (33421, "H", 2, (2, 2), True),
                 (33422, "B", 4, (0, 1, 1, 2), True), (50714, "H", 1, (black,), True),
                 (50717, "H", 1, (white,), True), (50721, "2i", 9, identity, True),
                 (50778, "H", 1, (21,), True), (271, "s", 0, "Invented", True), (272, "s", 0, "Camera", True)]
    buf = io.BytesIO()
    tifffile.imwrite(buf, cfa, photometric=32803, extratags=extratags, subfiletype=0)
    data = bytearray(buf.getvalue())
    if width or height:                                                # a header that lies about the size
        with tifffile.TiffFile(io.BytesIO(bytes(data))) as tif:
            tags = tif.pages.first.tags
            for code, value in ((256, width), (257, height)):
                if value:
                    tag = tags[code]
                    fmt = "<I" if tag.dtype_name in ("LONG", "I") or tag.dtype == 4 else "<H"
                    import struct
                    data[tag.valueoffset:tag.valueoffset + struct.calcsize(fmt)] = struct.pack(fmt, value)
    return bytes(data)


def test_16bit_tiff_without_a_profile_is_linear():
    a = np.random.default_rng(1).integers(0, 65536, (20, 30, 3), dtype=np.uint16)
    for kw in ({}, {"compression": "zlib"}, {"planarconfig": "separate"}):
        photo = load_image(tiff16(np.moveaxis(a, -1, 0) if kw.get("planarconfig") else a, **kw))
        np.testing.assert_array_equal(photo.rgb, a)
        assert photo.linear and photo.bit_depth == 16 and photo.source_format == "TIFF"
        assert "16-bit TIFF" in photo.decoding and "linear" in photo.decoding
        np.testing.assert_allclose(photo.linear_rgb(), a / 65535.0, atol=1e-7)
        np.testing.assert_allclose(box_mean_linear(photo, (0, 0, 30, 20)), (a / 65535.0).mean(axis=(0, 1)), atol=1e-9)


def test_16bit_tiff_with_an_icc_profile_or_told_is_srgb():
    a = np.random.default_rng(2).integers(0, 65536, (8, 8, 3), dtype=np.uint16)
    profile = b"\0" * 128                                              # any embedded profile: an encoded space
    photo = load_image(tiff16(a, extratags=[(34675, "B", len(profile), profile, True)]))
    assert not photo.linear and "sRGB decode" in photo.decoding
    told = load_image(tiff16(a), linear=False)
    assert not told.linear and told.decoding == "16-bit TIFF, sRGB decode, as told"
    assert told.linear_rgb()[0, 0, 0] != pytest.approx(a[0, 0, 0] / 65535.0, abs=1e-6) or a[0, 0, 0] in (0, 65535)


def test_8bit_and_array_inputs_are_srgb_unless_told():
    a = np.random.default_rng(3).integers(0, 256, (6, 5, 3), dtype=np.uint8)
    assert not load_image(a).linear and load_image(a).decoding == "8-bit array, sRGB decode"
    told = load_image(a, linear=True)
    assert told.linear and "linear" in told.decoding
    np.testing.assert_allclose(told.linear_rgb(), a / 255.0, atol=1e-7)
    with pytest.raises(InputError, match="linear"):
        load_image(a, linear="yes")
    with pytest.raises(InputError, match="linear"):
        Photo(rgb=a, bit_depth=8, width=5, height=6, source_format="array", linear=1)


def test_dng_is_read_by_libraw_as_linear_camera_rgb():
    flat = np.full((48, 64), 1000, np.uint16)
    photo = load_image(dng(flat))
    assert photo.source_format == "RAW" and photo.linear and photo.bit_depth == 16
    assert photo.rgb.shape == (48, 64, 3) and "LibRaw" in photo.decoding
    # LibRaw subtracts the black level and scales the white level to 65535; no white balance, no curve.
    expected = (1000 - BLACK) / (WHITE - BLACK) * 65535
    centre = photo.rgb[8:-8, 8:-8].reshape(-1, 3).mean(axis=0)
    np.testing.assert_allclose(centre, expected, rtol=0.01)
    brighter = load_image(dng(np.full((48, 64), 2 * 1000 - BLACK, np.uint16)))
    ratio = brighter.rgb[8:-8, 8:-8].reshape(-1, 3).mean(axis=0) / centre
    np.testing.assert_allclose(ratio, 2.0, rtol=0.01)                 # linear: twice the light, twice the code


def test_raw_by_extension_and_unreadable_raw(tmp_path):
    good = tmp_path / "frame.dng"
    good.write_bytes(dng(np.full((32, 32), 900, np.uint16)))
    assert load_image(good).source_format == "RAW"
    junk = tmp_path / "frame.nef"
    junk.write_bytes(b"\x00\x01not a raw file at all" * 50)
    with pytest.raises(InputError, match="could not be read by LibRaw") as info:
        load_image(junk)
    assert "16-bit linear TIFF" in str(info.value)
    with pytest.raises(InputError, match="could not be read by LibRaw"):
        load_image(b"FUJIFILMCCD-RAW 0201" + b"\0" * 400)
    cut = dng(np.full((64, 64), 900, np.uint16))
    for n in (200, len(cut) // 2):
        with pytest.raises(InputError):
            load_image(cut[:n])


def test_hostile_raw_headers_are_refused_before_decoding():
    t0 = time.monotonic()
    with pytest.raises(InputError, match="megapixels|limit|LibRaw"):
        load_image(dng(np.full((16, 16), 900, np.uint16), width=60000, height=60000))
    with pytest.raises(InputError, match="limit"):
        load_image(dng(np.full((64, 64), 900, np.uint16)), max_pixels=1000)
    assert time.monotonic() - t0 < 10


def test_thickness_map_reads_a_linear_photo_as_linear():
    from physics.inverse import _unique_linear

    a = np.random.default_rng(4).integers(0, 65536, (4, 4, 3), dtype=np.uint16)
    _, inv, lin = _unique_linear(a, 16, linear=True)
    np.testing.assert_allclose(lin[inv].reshape(a.shape), a / 65535.0, atol=1e-7)

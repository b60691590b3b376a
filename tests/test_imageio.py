"""Photo loading: every format and bit depth, orientation, every refusal, the sRGB
decode, box helpers, and fuzzing with random and damaged files.

Every test image is built in memory: 8-bit files with Pillow, 16-bit PNG and
TIFF files with the small writers below (Pillow cannot write 16-bit RGB), so
the expected code values are known exactly.
"""

import io
import struct
import zlib

import numpy as np
import pytest
from hypothesis import given, strategies as st
from PIL import Image, ImageOps

from physics.errors import InputError
from physics import imageio
from physics.imageio import (MAX_BYTES, MAX_PIXELS, Photo, box_mean_linear, box_saturated_fraction,
                             load_image, srgb_decode_lut)

RNG = np.random.default_rng(20240611)


# ---------------------------------------------------------------------------
# In-memory file writers
# ---------------------------------------------------------------------------

def _chunk(kind: bytes, body: bytes) -> bytes:
    return struct.pack(">I", len(body)) + kind + body + struct.pack(">I", zlib.crc32(kind + body))


def _filter_rows(rows: np.ndarray, bpp: int, filters) -> bytes:
    """PNG-filter (rows, bytes) uint8 scanlines; filters[i] in 0..4 is row i's filter type."""
    out = []
    prior = np.zeros(rows.shape[1], np.int32)
    for row, ftype in zip(rows.astype(np.int32), filters):
        left = np.concatenate([np.zeros(bpp, np.int32), row[:-bpp]])
        upleft = np.concatenate([np.zeros(bpp, np.int32), prior[:-bpp]])
        if ftype == 0:
            pred = np.zeros_like(row)
        elif ftype == 1:
            pred = left
        elif ftype == 2:
            pred = prior
        elif ftype == 3:
            pred = (left + prior) // 2
        else:
            p = left + prior - upleft
            pa, pb, pc = np.abs(p - left), np.abs(p - prior), np.abs(p - upleft)
            pred = np.where((pa <= pb) & (pa <= pc), left, np.where(pb <= pc, prior, upleft))
        out.append(bytes([ftype]) + ((row - pred) % 256).astype(np.uint8).tobytes())
        prior = row
    return b"".join(out)


_ADAM7 = ((0, 0, 8, 8), (4, 0, 8, 8), (0, 4, 4, 8), (2, 0, 4, 4), (0, 2, 2, 4), (1, 0, 2, 2),
          (0, 1, 1, 2))


def png16(a: np.ndarray, *, filters=(0,), interlace=False, size=None, trns=None, exif=None) -> bytes:
    """A 16-bit PNG of a (H, W, C) uint16 array, C = 1 (grey), 2 (grey+alpha), 3 (RGB), 4 (RGBA).

    ``filters`` cycle over the scanlines; ``size`` overrides the (width, height) in the header.
    """
    a = np.asarray(a, np.uint16)
    h, w, c = a.shape
    bpp = 2 * c
    colour_type = {1: 0, 2: 4, 3: 2, 4: 6}[c]
    passes = _ADAM7 if interlace else ((0, 0, 1, 1),)
    raw = b""
    for x0, y0, dx, dy in passes:
        sub = a[y0::dy, x0::dx]
        if sub.size == 0:
            continue
        rows = np.frombuffer(sub.astype(">u2").tobytes(), np.uint8).reshape(sub.shape[0], -1)
        raw += _filter_rows(rows, bpp, [filters[i % len(filters)] for i in range(len(rows))])
    width, height = size or (w, h)
    out = b"\x89PNG\r\n\x1a\n" + _chunk(b"IHDR", struct.pack(">IIBBBBB", width, height, 16,
                                                                colour_type, 0, 0, int(interlace)))
    if trns is not None:
        out += _chunk(b"tRNS", struct.pack(">3H", *trns))
    if exif is not None:
        out += _chunk(b"eXIf", exif.removeprefix(b"Exif\0\0"))
    return out + _chunk(b"IDAT", zlib.compress(raw)) + _chunk(b"IEND", b"")


def tiff(a: np.ndarray, *, order="<", deflate=False, predictor=False, planar=False,
         orientation=None, extra=None, photometric=2, size=None) -> bytes:
    """A one-strip (per plane) TIFF of a (H, W, C) uint8/uint16 array.

    ``extra`` is the ExtraSamples value for a 4th channel (0 unspecified, 1 premultiplied
    alpha, 2 straight alpha); ``size`` overrides the (width, height) in the header.
    """
    h, w, c = a.shape
    dt = np.dtype(order + ("u1" if a.dtype == np.uint8 else "u2"))
    planes = [a[..., i:i + 1] for i in range(c)] if planar else [a]
    strips = []
    for plane in planes:
        d = plane.astype(dt)
        if predictor:
            d = d.copy()
            d[:, 1:] = plane[:, 1:].astype(dt) - plane[:, :-1].astype(dt)
        b = d.tobytes()
        strips.append(zlib.compress(b) if deflate else b)
    width, height = size or (w, h)
    tags = [(256, 4, [width]), (257, 4, [height]), (258, 3, [dt.itemsize * 8] * c),
            (259, 3, [8 if deflate else 1]), (262, 3, [photometric]), (273, 4, [0] * len(strips)),
            (277, 3, [c]), (278, 4, [height]), (279, 4, [len(s) for s in strips]),
            (284, 3, [2 if planar else 1])]
    if orientation is not None:
        tags.append((274, 3, [orientation]))
    if predictor:
        tags.append((317, 3, [2]))
    if extra is not None:
        tags.append((338, 3, [extra]))
    tags.sort()
    data = b"".join(strips)
    offsets, pos = [], 8
    for s in strips:
        offsets.append(pos)
        pos += len(s)
    tags = [(t, ty, offsets if t == 273 else v) for t, ty, v in tags]
    blob = b""
    base = 8 + len(data)
    entries = []
    for tag, ty, values in tags:
        fmt = {3: "H", 4: "I"}[ty]
        packed = struct.pack(order + fmt * len(values), *values)
        if len(packed) <= 4:
            entries.append(struct.pack(order + "HHI", tag, ty, len(values)) + packed.ljust(4, b"\0"))
        else:
            entries.append(struct.pack(order + "HHII", tag, ty, len(values), base + len(blob)))
            blob += packed + b"\0" * (len(packed) % 2)
    ifd_at = base + len(blob)
    head = (b"II" if order == "<" else b"MM") + struct.pack(order + "HI", 42, ifd_at)
    ifd = struct.pack(order + "H", len(entries)) + b"".join(entries) + struct.pack(order + "I", 0)
    return head + data + blob + ifd


def pil_bytes(im: Image.Image, fmt: str, **kw) -> bytes:
    buf = io.BytesIO()
    im.save(buf, fmt, **kw)
    return buf.getvalue()


def rgb8(h=6, w=9) -> np.ndarray:
    return RNG.integers(0, 256, (h, w, 3), dtype=np.uint8)


def rgb16(h=6, w=9) -> np.ndarray:
    return RNG.integers(0, 65536, (h, w, 3), dtype=np.uint16)


def with_alpha(a: np.ndarray, alpha) -> np.ndarray:
    return np.concatenate([a, np.broadcast_to(np.asarray(alpha, a.dtype), a.shape[:2] + (1,))], axis=2)


def refused(source, *match, **kw) -> str:
    """Load ``source``, expect InputError, check every ``match`` word is in its message."""
    with pytest.raises(InputError) as info:
        load_image(source, **kw)
    msg = str(info.value)
    for word in match:
        assert word.lower() in msg.lower(), msg
    return msg


# ---------------------------------------------------------------------------
# Formats and bit depths
# ---------------------------------------------------------------------------

def _check(photo: Photo, expected: np.ndarray, fmt: str):
    assert isinstance(photo, Photo)
    assert photo.source_format == fmt
    assert photo.rgb.dtype == expected.dtype
    assert photo.bit_depth == 8 * expected.dtype.itemsize
    assert (photo.height, photo.width) == expected.shape[:2]
    assert photo.rgb.flags.c_contiguous and not photo.rgb.flags.writeable
    np.testing.assert_array_equal(photo.rgb, expected)


def test_png_8bit_rgb():
    a = rgb8()
    _check(load_image(pil_bytes(Image.fromarray(a), "PNG")), a, "PNG")


def test_png_8bit_opaque_alpha_is_dropped():
    a = rgb8()
    _check(load_image(pil_bytes(Image.fromarray(with_alpha(a, 255), "RGBA"), "PNG")), a, "PNG")


def test_png_palette_becomes_rgb():
    a = np.zeros((4, 6, 3), np.uint8)
    a[:, :3] = (200, 10, 30)
    a[:, 3:] = (5, 120, 250)
    im = Image.fromarray(a).convert("P", palette=Image.Palette.ADAPTIVE, colors=4)
    photo = load_image(pil_bytes(im, "PNG"))
    _check(photo, a, "PNG")


@pytest.mark.parametrize("filters", [(0,), (1,), (2,), (3,), (4,), (0, 1, 2, 3, 4)])
@pytest.mark.parametrize("interlace", [False, True])
def test_png_16bit_rgb_every_filter(filters, interlace):
    a = rgb16(11, 13)
    _check(load_image(png16(a, filters=filters, interlace=interlace)), a, "PNG")


def test_png_16bit_keeps_low_bytes():
    # Values that differ only in the low byte must stay distinct.
    a = np.array([[[0x1200, 0x1201, 0x12FF], [0xFF00, 0x00FF, 0x0001]],
                  [[0xABCD, 0xCDAB, 0x8000], [0, 1, 65535]]], np.uint16)
    photo = load_image(png16(a, filters=(4,)))
    _check(photo, a, "PNG")


def test_png_16bit_opaque_alpha_is_dropped():
    a = rgb16()
    _check(load_image(png16(with_alpha(a, 65535), filters=(4, 3))), a, "PNG")


def test_jpeg_8bit():
    a = np.zeros((16, 24, 3), np.uint8)
    a[:, :12] = (180, 40, 60)
    a[:, 12:] = (30, 90, 200)
    photo = load_image(pil_bytes(Image.fromarray(a), "JPEG", quality=95))
    assert photo.source_format == "JPEG" and photo.bit_depth == 8
    assert photo.rgb.shape == a.shape and photo.rgb.dtype == np.uint8
    # Lossy: block centres within a few code values.
    assert np.abs(photo.rgb[4:12, 2:8].astype(int) - a[4:12, 2:8]).max() <= 6
    assert np.abs(photo.rgb[4:12, 16:22].astype(int) - a[4:12, 16:22]).max() <= 6
    assert photo.orientation_applied is False


def test_multi_picture_jpeg_reads_first_picture():
    a = np.full((8, 8, 3), (20, 200, 90), np.uint8)
    im = Image.fromarray(a)
    data = pil_bytes(im, "MPO", save_all=True, append_images=[Image.fromarray(a[::-1].copy())])
    photo = load_image(data)
    assert photo.source_format == "JPEG" and photo.rgb.shape == (8, 8, 3)


@pytest.mark.parametrize("compression", [None, "tiff_lzw", "tiff_deflate", "packbits"])
def test_tiff_8bit(compression):
    a = rgb8()
    kw = {"compression": compression} if compression else {}
    _check(load_image(pil_bytes(Image.fromarray(a), "TIFF", **kw)), a, "TIFF")


def test_tiff_8bit_handwritten_planar():
    a = rgb8()
    _check(load_image(tiff(a, planar=True)), a, "TIFF")


@pytest.mark.parametrize("order", ["<", ">"])
@pytest.mark.parametrize("deflate,predictor", [(False, False), (True, False), (True, True)])
def test_tiff_16bit_rgb(order, deflate, predictor):
    a = rgb16(7, 10)
    _check(load_image(tiff(a, order=order, deflate=deflate, predictor=predictor)), a, "TIFF")


def test_tiff_8bit_jpeg_compressed():
    a = np.full((16, 16, 3), (200, 120, 40), np.uint8)
    photo = load_image(pil_bytes(Image.fromarray(a), "TIFF", compression="jpeg", quality=95))
    assert photo.bit_depth == 8 and photo.rgb.shape == a.shape
    assert np.abs(photo.rgb.astype(int) - a).max() <= 4


@pytest.mark.parametrize("deflate", [False, True])
def test_tiff_16bit_planar_is_read_by_tifffile(deflate):
    a = np.random.default_rng(21).integers(0, 65536, (6, 9, 3), dtype=np.uint16)   # leaves RNG's sequence alone
    photo = load_image(tiff(a, planar=True, deflate=deflate))
    _check(photo, a, "TIFF")
    assert "tifffile" in photo.decoding and photo.linear


@pytest.mark.parametrize("extra", [0, 1, 2])
def test_tiff_16bit_fourth_channel_opaque(extra):
    # Unspecified extra sample is ignored; an opaque alpha (straight or premultiplied) is dropped.
    a = rgb16()
    fourth = 1234 if extra == 0 else 65535
    _check(load_image(tiff(with_alpha(a, fourth), extra=extra, order=">")), a, "TIFF")


def test_array_inputs():
    a8, a16 = rgb8(), rgb16()
    _check(load_image(a8), a8, "array")
    _check(load_image(a16), a16, "array")
    _check(load_image(a16.astype(">u2")), a16, "array")          # other byte order
    wide = rgb8(6, 18)
    _check(load_image(wide[:, ::2]), wide[:, ::2], "array")      # not contiguous
    src = a8.copy()
    photo = load_image(src)
    src[0, 0] = 7 if src[0, 0, 0] != 7 else 8
    assert not np.array_equal(photo.rgb, src)                    # a copy, not a view


def test_bytes_like_and_path_sources(tmp_path):
    a = rgb8()
    data = pil_bytes(Image.fromarray(a), "PNG")
    for source in (bytearray(data), memoryview(data)):
        _check(load_image(source), a, "PNG")
    path = tmp_path / "photo.png"
    path.write_bytes(data)
    _check(load_image(path), a, "PNG")
    _check(load_image(str(path)), a, "PNG")


# ---------------------------------------------------------------------------
# Orientation
# ---------------------------------------------------------------------------

def _exif(orientation: int) -> bytes:
    exif = Image.Exif()
    exif[0x0112] = orientation
    return exif.tobytes()


def test_jpeg_exif_orientation_6_turns_clockwise():
    # Stored 32 wide x 16 tall; a green block in the stored top-left corner.
    a = np.full((16, 32, 3), (40, 40, 200), np.uint8)
    a[:8, :8] = (30, 200, 40)
    photo = load_image(pil_bytes(Image.fromarray(a), "JPEG", quality=95, exif=_exif(6)))
    assert photo.orientation_applied is True
    assert photo.rgb.shape == (32, 16, 3) and (photo.width, photo.height) == (16, 32)
    # Turned 90 deg clockwise, the stored top-left corner is the upright top-right corner.
    top_right = photo.rgb[:8, 8:].reshape(-1, 3).mean(axis=0)
    bottom_left = photo.rgb[24:, :8].reshape(-1, 3).mean(axis=0)
    assert top_right[1] > 150 and top_right[2] < 100
    assert bottom_left[2] > 150 and bottom_left[1] < 100


@pytest.mark.parametrize("orientation", range(1, 9))
def test_png_every_orientation_matches_pillow_exif_transpose(orientation):
    a = rgb8(5, 7)
    data = pil_bytes(Image.fromarray(a), "PNG", exif=_exif(orientation))
    photo = load_image(data)
    expected = np.asarray(ImageOps.exif_transpose(Image.open(io.BytesIO(data))))
    np.testing.assert_array_equal(photo.rgb, expected)
    assert photo.orientation_applied is (orientation != 1)


def test_tiff_16bit_orientation_6():
    a = rgb16(4, 6)
    photo = load_image(tiff(a, orientation=6))
    np.testing.assert_array_equal(photo.rgb, np.rot90(a, k=-1))
    assert photo.orientation_applied and (photo.width, photo.height) == (4, 6)


def test_tiff_8bit_orientation_3():
    a = rgb8(4, 6)
    photo = load_image(tiff(a, orientation=3, order=">"))
    np.testing.assert_array_equal(photo.rgb, a[::-1, ::-1])
    assert photo.orientation_applied and (photo.width, photo.height) == (6, 4)


def test_png_16bit_orientation_8():
    a = rgb16(4, 6)
    photo = load_image(png16(a, exif=_exif(8)))
    np.testing.assert_array_equal(photo.rgb, np.rot90(a, k=1))


# ---------------------------------------------------------------------------
# Refusals
# ---------------------------------------------------------------------------

def test_empty_input():
    refused(b"", "empty")
    refused(bytearray(), "empty")


def test_not_an_image():
    refused(b"hello, this is a text file\n" * 3, "not a JPEG, PNG or TIFF", "export")
    refused(b"%PDF-1.7 ...", "PDF", "JPEG, PNG and TIFF")
    refused(b"GIF89a" + b"\0" * 20, "GIF")
    refused(b"RIFF\0\0\0\0WEBPVP8 ", "WebP")
    refused(pil_bytes(Image.fromarray(rgb8()), "BMP"), "BMP")


@pytest.mark.parametrize("fmt", ["PNG", "JPEG", "TIFF"])
def test_truncated_and_corrupt(fmt):
    data = pil_bytes(Image.fromarray(rgb8(40, 50)), fmt)
    refused(data[:len(data) // 2], fmt, "damaged")
    refused(data[:20], fmt)
    # Right signature, garbage after it.
    refused(data[:8] + bytes(range(256)) * 4, fmt)


def _png_chunks(data: bytes):
    """(offset, type) of every chunk of a PNG, walking its lengths."""
    pos, out = 8, []
    while pos < len(data):
        length = struct.unpack(">I", data[pos:pos + 4])[0]
        out.append((pos, data[pos + 4:pos + 8]))
        pos += 12 + length
    return out


@pytest.mark.parametrize("kind", ["8-bit", "16-bit", "palette"])
def test_a_png_cut_anywhere_after_its_signature_is_refused(kind):
    """Pillow itself takes a PNG cut in the image data's last bytes, its CRC or IEND (and never needs IEND)."""
    data = {"8-bit": lambda: pil_bytes(Image.fromarray(rgb8(30, 40)), "PNG"),
            "16-bit": lambda: png16(rgb16(12, 10)),
            "palette": lambda: pil_bytes(Image.fromarray(rgb8(30, 40)).convert("P"), "PNG")}[kind]()
    load_image(data)
    for cut in range(8, len(data)):
        msg = refused(data[:cut], "PNG")
        assert "truncated" in msg or "damaged" in msg, (cut, msg)
    assert "end marker (IEND)" in refused(data[:-12], "truncated")
    assert "inside its IEND chunk" in refused(data[:-3], "truncated")


def test_truncated_jpeg_and_tiff_are_refused_wherever_they_are_cut():
    for fmt, kw in (("JPEG", {}), ("JPEG", {"progressive": True}), ("TIFF", {}), ("TIFF", {"compression": "tiff_lzw"})):
        data = pil_bytes(Image.fromarray(rgb8(24, 32)), fmt, **kw)
        for cut in range(1, len(data), 7):
            refused(data[:cut])


def test_truncated_images_are_never_taken_by_pillow_either():
    from PIL import ImageFile

    import views.inverse  # noqa: F401  (everything the page imports leaves Pillow's setting alone)
    import views.render  # noqa: F401
    assert ImageFile.LOAD_TRUNCATED_IMAGES is False


def test_a_damaged_png_chunk_or_too_many_chunks_are_refused(monkeypatch):
    data = pil_bytes(Image.fromarray(rgb8(20, 20)), "PNG")
    (ihdr, _), (idat, _) = _png_chunks(data)[:2]
    flipped = bytearray(data)
    flipped[idat + 10] ^= 0xFF
    refused(bytes(flipped), "damaged", "checksum of its IDAT chunk")
    flipped = bytearray(data)
    flipped[ihdr + 8 + 9] ^= 0x01                              # IHDR's colour type, CRC not updated
    refused(bytes(flipped), "checksum of its IHDR chunk")
    assert load_image(data + b"trailing bytes after the end").width == 20
    monkeypatch.setattr(imageio, "MAX_PNG_CHUNKS", 2)
    refused(data, "more than 2 chunks")


def test_messages_name_a_file_never_its_folders(tmp_path):
    folder = tmp_path / "server-side-folder"
    folder.mkdir()
    for source in (folder / "missing.png", folder, str(folder / "x\0y.png")):
        msg = refused(source)
        assert "server-side-folder" not in msg or source == folder, msg
        assert str(tmp_path) not in msg, msg


def test_truncated_16bit_png_and_tiff():
    refused(png16(rgb16(20, 20), filters=(4,))[:-40], "PNG")
    data = tiff(rgb16(20, 20), deflate=True)
    refused(data[:60] + b"\0" * (len(data) - 60), "TIFF")


def test_cmyk_refused():
    im = Image.new("CMYK", (8, 8), (10, 20, 30, 0))
    for fmt in ("JPEG", "TIFF"):
        refused(pil_bytes(im, fmt), "CMYK", "export it as RGB")


@pytest.mark.parametrize("mode,word", [("L", "greyscale (mode L)"), ("LA", "greyscale with alpha"),
                                       ("1", "black-and-white"), ("I;16", "greyscale")])
def test_greyscale_refused(mode, word):
    refused(pil_bytes(Image.new(mode, (8, 8)), "PNG"), word, "colour photo", "export it as RGB")


def test_greyscale_jpeg_and_16bit_png_refused():
    refused(pil_bytes(Image.new("L", (8, 8), 90), "JPEG"), "greyscale (mode L)", "colour photo",
            "export it as RGB")
    refused(png16(RNG.integers(0, 65536, (4, 4, 1), dtype=np.uint16)), "greyscale", "RGB")
    refused(png16(RNG.integers(0, 65536, (4, 4, 2), dtype=np.uint16)), "greyscale", "RGB")
    refused(tiff(RNG.integers(0, 65536, (4, 4, 1), dtype=np.uint16), photometric=1), "greyscale")


def test_transparency_refused():
    a = with_alpha(rgb8(), 255)
    a[2, 3, 3] = 254
    msg = refused(pil_bytes(Image.fromarray(a, "RGBA"), "PNG"), "transparen", "opaque")
    assert "1 of 54" in msg
    b = with_alpha(rgb16(), 65535)
    b[0, 0, 3] = 65534                                   # differs only in the low byte
    refused(png16(b), "transparen")
    refused(tiff(b, extra=2), "transparen")
    refused(tiff(b, extra=1, order=">"), "transparen")   # premultiplied


def test_colour_key_transparency_refused():
    a = rgb8()
    key = tuple(int(v) for v in a[1, 1])
    refused(pil_bytes(Image.fromarray(a), "PNG", transparency=key), "transparen")
    a2 = a.copy()
    a2[np.all(a2 == key, axis=-1)] = (0, 0, 0) if key != (0, 0, 0) else (1, 1, 1)
    _check(load_image(pil_bytes(Image.fromarray(a2), "PNG", transparency=key)), a2, "PNG")
    b = rgb16()
    refused(png16(b, trns=tuple(int(v) for v in b[2, 2])), "transparen")


def test_palette_with_transparency_refused():
    im = Image.new("P", (6, 6), 0)
    im.putpalette([255, 0, 0, 0, 255, 0] + [0] * 762)
    im.putpixel((2, 2), 1)
    refused(pil_bytes(im, "PNG", transparency=1), "transparen")


def test_too_small():
    refused(pil_bytes(Image.fromarray(rgb8(1, 5)), "PNG"), "5 x 1", "at least 2 x 2")
    refused(rgb8(5, 1), "1 x 5", "at least 2 x 2")


def test_too_many_pixels_from_header_only():
    # Headers claiming 10000 x 10000 with almost no data: refused before decoding.
    a = rgb16(2, 2)
    msg = refused(png16(a, size=(10000, 10000)), "10000 x 10000", "100.0 megapixels", "50.0 megapixels")
    assert "crop" in msg.lower()
    refused(tiff(rgb8(2, 2), size=(12000, 9000)), "12000 x 9000", "108.0 megapixels",
            "50.0 megapixels")
    # Above Pillow's own bomb limit the refusal is still an InputError naming the size.
    refused(png16(a, size=(30000, 30000)), "900.0 megapixels", "limit")


def test_max_pixels_and_max_bytes_arguments(tmp_path):
    a = rgb8(10, 10)
    data = pil_bytes(Image.fromarray(a), "PNG")
    refused(data, "10 x 10", "limit is 99 pixels", max_pixels=99)
    refused(a, "10 x 10", max_pixels=99)
    refused(data, "limit is", f"({len(data):,} bytes)", max_bytes=len(data) - 1)
    path = tmp_path / "p.png"
    path.write_bytes(data)
    refused(path, f"({len(data):,} bytes)", max_bytes=100)
    refused(memoryview(data), "bytes", max_bytes=100)
    assert MAX_PIXELS == 50_000_000 and MAX_BYTES == 200_000_000
    for bad in (0, -5, 1.5, True, "10"):
        refused(data, "max_pixels", max_pixels=bad)
        refused(data, "max_bytes", max_bytes=bad)


def test_default_byte_limit_checked_before_reading(tmp_path):
    path = tmp_path / "huge.tif"
    with open(path, "wb") as fh:                 # sparse: no disk or memory is used
        fh.write(b"II*\x00")
        fh.truncate(MAX_BYTES + 1)
    refused(path, "200.0 MB", f"({MAX_BYTES + 1:,} bytes)", "smaller")


def test_bad_paths_and_types(tmp_path):
    refused(tmp_path / "missing.png", "no file", "check the path")
    refused(tmp_path, "folder")
    refused(str(tmp_path / "x\0y.png"), "cannot read")
    refused(12, "int", "bytes")
    refused([[1, 2, 3]], "list")


def test_bad_arrays():
    refused(np.zeros((4, 4), np.uint8), "shape (4, 4)", "greyscale")
    refused(np.zeros((4, 4, 4), np.uint8), "shape (4, 4, 4)", "alpha")
    refused(np.zeros((3, 5, 6), np.uint8), "(height, width, 3)")
    refused(np.zeros((4, 4, 3), np.float64), "dtype float64", "uint8")
    refused(np.zeros((4, 4, 3), np.int32), "dtype int32")
    refused(np.zeros((4, 4, 3), bool), "dtype bool")
    refused(np.zeros((4, 4, 3), np.uint32), "dtype uint32")
    nan = np.zeros((4, 4, 3))
    nan[1, 1, 1] = np.nan
    refused(nan, "NaN")
    refused(np.zeros((2, 2, 3, 1), np.uint8), "shape")


def test_photo_checks_its_fields():
    a = rgb8()
    with pytest.raises(InputError, match="bit_depth"):
        Photo(rgb=a, bit_depth=16, width=9, height=6, source_format="array")
    with pytest.raises(InputError, match="does not match"):
        Photo(rgb=a, bit_depth=8, width=6, height=9, source_format="array")
    with pytest.raises(InputError, match="shape"):
        Photo(rgb=a[..., 0], bit_depth=8, width=9, height=6, source_format="array")
    with pytest.raises(InputError, match="source_format"):
        Photo(rgb=a, bit_depth=8, width=9, height=6, source_format="GIF")


# ---------------------------------------------------------------------------
# sRGB decode
# ---------------------------------------------------------------------------

def _srgb_formula(v: np.ndarray) -> np.ndarray:
    """IEC 61966-2-1 decoding, written out on float64 values 0..1."""
    return np.where(v <= 0.04045, v / 12.92, ((v + 0.055) / 1.055) ** 2.4)


@pytest.mark.parametrize("bits", [8, 16])
def test_lut_matches_formula_and_is_monotonic(bits):
    n = 2**bits
    lut = srgb_decode_lut(bits)
    assert lut.shape == (n,) and lut.dtype == np.float32 and not lut.flags.writeable
    expected = _srgb_formula(np.arange(n) / (n - 1))
    assert np.max(np.abs(lut.astype(np.float64) - expected)) < 1e-6
    assert np.max(np.abs(srgb_decode_lut(bits, np.float64) - expected)) < 1e-15
    assert np.all(np.diff(lut) > 0)
    assert lut[0] == 0.0 and lut[-1] == 1.0


def test_lut_refuses_bad_arguments():
    with pytest.raises(InputError, match="8 or 16"):
        srgb_decode_lut(12)
    with pytest.raises(InputError, match="float32 or float64"):
        srgb_decode_lut(8, np.int16)


@pytest.mark.parametrize("make", [rgb8, rgb16])
def test_linear_decode(make):
    a = make(5, 8)
    lin = load_image(a).linear_rgb()
    assert lin.shape == a.shape and lin.dtype == np.float32
    expected = _srgb_formula(a / float(np.iinfo(a.dtype).max))
    assert np.max(np.abs(lin - expected)) < 1e-6
    # Spot values: the linear segment and the power segment.
    assert load_image(np.full((2, 2, 3), 10, np.uint8)).linear_rgb()[0, 0, 0] == pytest.approx(
        10 / 255 / 12.92, abs=1e-7)
    assert load_image(np.full((2, 2, 3), 128, np.uint8)).linear_rgb()[0, 0, 0] == pytest.approx(
        ((128 / 255 + 0.055) / 1.055) ** 2.4, abs=1e-7)


# ---------------------------------------------------------------------------
# Boxes
# ---------------------------------------------------------------------------

@pytest.mark.parametrize("make", [rgb8, rgb16])
def test_box_mean_linear(make, monkeypatch):
    photo = load_image(make(12, 20))
    lin = photo.linear_rgb().astype(np.float64)
    for box in [(0, 0, 20, 12), (3, 2, 4, 3), (5, 1, 17, 11)]:
        x0, y0, x1, y1 = box
        mean = box_mean_linear(photo, box)
        assert mean.shape == (3,)
        np.testing.assert_allclose(mean, lin[y0:y1, x0:x1].mean(axis=(0, 1)), atol=1e-6)
    # Same answer when the box is summed in many small row chunks.
    monkeypatch.setattr(imageio, "_CHUNK_PIXELS", 7)
    np.testing.assert_allclose(box_mean_linear(photo, (5, 1, 17, 11)),
                               lin[1:11, 5:17].mean(axis=(0, 1)), atol=1e-6)


def test_box_mean_uses_upright_coordinates():
    a = np.zeros((4, 6, 3), np.uint8)
    a[0, 0] = 255                               # stored top-left pixel is white
    photo = load_image(pil_bytes(Image.fromarray(a), "PNG", exif=_exif(6)))
    assert (photo.width, photo.height) == (4, 6)
    np.testing.assert_allclose(box_mean_linear(photo, (3, 0, 4, 1)), [1, 1, 1])   # now top-right
    np.testing.assert_allclose(box_mean_linear(photo, (0, 0, 1, 1)), [0, 0, 0])


@pytest.mark.parametrize("dtype,full", [(np.uint8, 255), (np.uint16, 65535)])
def test_box_saturated_fraction(dtype, full, monkeypatch):
    a = np.full((4, 5, 3), 100, dtype)
    a[0, 0, 0] = full            # one channel clipped
    a[1, 2] = full               # all channels clipped
    a[3, 4, 2] = full - 1        # close, not clipped
    photo = load_image(a)
    assert box_saturated_fraction(photo, (0, 0, 5, 4)) == pytest.approx(2 / 20)
    assert box_saturated_fraction(photo, (0, 0, 1, 1)) == 1.0
    assert box_saturated_fraction(photo, (2, 2, 5, 4)) == 0.0
    monkeypatch.setattr(imageio, "_CHUNK_PIXELS", 1)
    assert box_saturated_fraction(photo, (0, 0, 5, 4)) == pytest.approx(2 / 20)


@pytest.mark.parametrize("helper", [box_mean_linear, box_saturated_fraction])
def test_bad_boxes(helper):
    photo = load_image(rgb8(6, 9))
    cases = [((2, 2, 2, 5), "empty"), ((2, 2, 5, 2), "empty"), ((5, 1, 2, 4), "inverted"),
             ((1, 5, 3, 2), "inverted"), ((0, 0, 10, 6), "outside"), ((-1, 0, 3, 3), "outside"),
             ((0, 0, 9, 7), "outside"), ((0, 0, 3), "4"), ((0, 0, 1.5, 2), "whole"),
             ((0, 0, float("nan"), 2), "whole"), ((0, 0, True, 2), "whole"), (None, "(x0, y0, x1, y1)")]
    for box, word in cases:
        with pytest.raises(InputError) as info:
            helper(photo, box)
        msg = str(info.value)
        assert word in msg, msg
        assert "9 x 6" in msg or word == "whole", msg
    assert helper(photo, (np.int64(0), 0.0, 9, np.int32(6))) is not None


# ---------------------------------------------------------------------------
# Fuzzing: bad bytes only ever raise InputError
# ---------------------------------------------------------------------------

def _only_input_error(data: bytes):
    try:
        photo = load_image(data)
    except InputError:
        return
    assert isinstance(photo, Photo) and photo.rgb.ndim == 3


_VALID = {
    "png8": pil_bytes(Image.fromarray(rgb8(12, 16)), "PNG"),
    "jpeg": pil_bytes(Image.fromarray(rgb8(12, 16)), "JPEG", exif=_exif(6)),
    "tiff8": pil_bytes(Image.fromarray(rgb8(12, 16)), "TIFF", compression="tiff_lzw"),
    "png16": png16(rgb16(12, 16), filters=(0, 1, 2, 3, 4), interlace=True),
    "tiff16": tiff(rgb16(12, 16), deflate=True, predictor=True),
}
_SIGNATURES = [b"\x89PNG\r\n\x1a\n", b"\xff\xd8\xff", b"II*\x00", b"MM\x00*", b"II+\x00"]


@given(st.binary(max_size=600))
def test_random_bytes_only_raise_input_error(data):
    _only_input_error(data)


@given(st.sampled_from(_SIGNATURES), st.binary(max_size=600))
def test_random_bytes_after_a_signature_only_raise_input_error(signature, data):
    _only_input_error(signature + data)


@given(st.sampled_from(sorted(_VALID)), st.floats(0.0, 1.0, exclude_max=True))
def test_truncated_files_only_raise_input_error(name, share):
    data = _VALID[name]
    _only_input_error(data[:int(share * len(data))])


@given(st.sampled_from(sorted(_VALID)),
       st.lists(st.tuples(st.floats(0.0, 1.0, exclude_max=True), st.integers(0, 255)),
                min_size=1, max_size=6))
def test_damaged_files_only_raise_input_error(name, changes):
    data = bytearray(_VALID[name])
    for where, value in changes:
        data[int(where * len(data))] = value
    _only_input_error(bytes(data))


@given(st.integers(2, 9), st.integers(2, 9), st.sampled_from([3, 4]),
       st.lists(st.integers(0, 4), min_size=1, max_size=5), st.booleans(), st.randoms())
def test_png_16bit_round_trip(h, w, channels, filters, interlace, rnd):
    a = np.array([[[rnd.randrange(65536) for _ in range(channels)] for _ in range(w)]
                  for _ in range(h)], np.uint16)
    if channels == 4:
        a[..., 3] = 65535
    photo = load_image(png16(a, filters=tuple(filters), interlace=interlace))
    np.testing.assert_array_equal(photo.rgb, a[..., :3])

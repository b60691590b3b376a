"""Photos in: a user's JPEG, PNG, TIFF or camera RAW/DNG (or an array) as checked RGB pixels.

:func:`load_image` turns bytes, a file path or a numpy array into a
:class:`Photo`: an (height, width, 3) RGB array of the file's own code values,
8 or 16 bits per channel, turned upright by the file's EXIF orientation tag.
:attr:`Photo.linear` says whether the code values are linear light (a linear
16-bit TIFF, a camera RAW) or sRGB-encoded (JPEG, PNG, 8-bit TIFF), and
:meth:`Photo.linear_rgb` turns them into linear light (code / max_code, or the
sRGB transfer function); :func:`box_mean_linear` and
:func:`box_saturated_fraction` summarise a rectangle of pixels.

Safety: the file size is checked before reading, the format by its first bytes,
and the pixel count from the header before any pixel is decoded. Every bad
input (empty, damaged, truncated, not an image, greyscale, CMYK, transparent,
too small, too large) raises :class:`~physics.errors.InputError` whose message
says what was wrong and how to fix it; no other exception escapes for a bad file.

16 bits per channel: Pillow keeps at most 8 bits per channel in an RGB image,
so a 16-bit RGB(A) PNG or TIFF is decoded twice by Pillow's own decoders, once
keeping the high byte of every sample and once the low byte (the same data
read with the opposite byte order), and the two are joined into uint16. No
other image library is needed for those. A 16-bit TIFF stored plane by plane
(planar configuration 2), or one Pillow cannot open, is read by tifffile, its
size checked from the header first.

Linear inputs: a camera RAW or DNG (sniffed by its first bytes or its file name
ending) is rendered by LibRaw through rawpy as linear camera RGB, 16 bits, with
no tone curve and no white balance (:data:`RAW_POSTPROCESS`); its sizes are read
from the header and checked before the pixels are unpacked. A 16-bit TIFF
without an ICC profile is taken as linear light; see :func:`load_image` for the
rule and the override. :attr:`Photo.decoding` names the path taken.

Conventions: arrays are (row, column, channel) = (y down, x right, R G B);
pixel boxes are ``(x0, y0, x1, y1)`` with x1 and y1 exclusive, in pixels of the
upright (orientation-applied) image. Code values that are not linear are taken
to be sRGB-encoded; an embedded ICC profile is not applied.

References
----------
IEC 61966-2-1:1999, Multimedia systems and equipment - Colour measurement and
management - Default RGB colour space - sRGB (the transfer function).
JEITA CP-3451 (Exif), tag 0x0112 Orientation. ISO 15948 / W3C PNG specification.
TIFF Revision 6.0 (Adobe, 1992). Adobe Digital Negative (DNG) Specification 1.4
(2012). LibRaw API documentation (output parameters).
"""

from __future__ import annotations

import functools
import io
import os
import re
import stat
import sys
import warnings
import zlib
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from PIL import Image

from .errors import InputError

__all__ = [
    "Photo", "load_image", "box_mean_linear", "box_saturated_fraction", "srgb_decode_lut",
    "MAX_PIXELS", "MAX_BYTES", "MIN_SIDE", "FORMATS", "RAW_EXTENSIONS", "RAW_POSTPROCESS",
]

#: Most pixels (width x height) accepted; checked from the header before decoding.
MAX_PIXELS = 50_000_000
#: Largest file accepted, bytes (200 MB; 1 MB = 10**6 bytes in every size stated here); checked before the
#: file is read.
MAX_BYTES = 200_000_000
#: Most chunks read from a PNG file. Encoders write image data in chunks of 8-64 kB (libpng's default is
#: 8 kB; common practice), so a 200 MB photo has about 25,000; the bound keeps the chunk-by-chunk walk
#: (here and in Pillow) short whatever a hostile file holds.
MAX_PNG_CHUNKS = 200_000
#: Smallest width and height accepted, pixels.
MIN_SIDE = 2
#: File formats read, as reported in :attr:`Photo.source_format` ("RAW": a camera RAW or DNG file, read by
#: LibRaw through rawpy).
FORMATS = ("JPEG", "PNG", "TIFF", "RAW")
#: File name endings of camera RAW formats (a path with one of these is read as RAW whatever its first bytes).
RAW_EXTENSIONS = (".dng", ".nef", ".nrw", ".cr2", ".cr3", ".crw", ".arw", ".srf", ".sr2", ".raf", ".orf",
                  ".rw2", ".rwl", ".pef", ".srw", ".3fr", ".iiq", ".erf", ".kdc", ".dcr", ".mrw", ".x3f")
#: First bytes of camera RAW formats that are not TIFF-shaped (Fujifilm RAF, Olympus ORF, Panasonic RW2).
_RAW_SIGNATURES = (b"FUJIFILMCCD-RAW", b"IIRO", b"IIRS", b"MMOR", b"IIU\x00")
#: How LibRaw renders a RAW here: no tone curve (gamma 1), no brightening, no white balance (all channel
#: multipliers 1), the camera's own RGB (no colour matrix), 16 bits: linear camera RGB for a calibration.
RAW_POSTPROCESS = dict(gamma=(1, 1), no_auto_bright=True, use_camera_wb=False, use_auto_wb=False,
                       user_wb=[1.0, 1.0, 1.0, 1.0], output_bps=16)

_EXPORT_HINT = "Export the photo as an RGB JPEG, PNG or TIFF (8 or 16 bits per channel)."
_GREY_MODES = {"1": "black-and-white (1 bit per pixel)", "L": "greyscale (mode L)",
               "LA": "greyscale with alpha (mode LA)", "La": "greyscale with alpha (mode La)",
               "I": "greyscale (mode I)", "F": "greyscale (mode F, floating point)"}
_OTHER_COLOUR_MODES = {"CMYK": "CMYK (printing colours)", "LAB": "CIELAB", "HSV": "HSV"}
# Rawmodes of 16-bit-per-sample RGB data in Pillow's decoders, and the byte
# order letter that reads the other byte of each sample.
_RAW16 = re.compile(r"^(RGB|RGBA|RGBX|RGBa);16([LBN])$")
_OTHER_BYTE = {"L": "B", "B": "L", "N": "B" if sys.byteorder == "little" else "L"}
# First bytes of formats that are refused by name.
_OTHER_SIGNATURES = (
    (b"GIF87a", "GIF"), (b"GIF89a", "GIF"), (b"BM", "BMP"), (b"%PDF", "PDF"),
    (b"8BPS", "Photoshop (PSD)"), (b"\x00\x00\x00\x0cjP  ", "JPEG 2000"),
    (b"\xff\x4f\xff\x51", "JPEG 2000"), (b"\x00\x00\x01\x00", "ICO"),
    (b"qoif", "QOI"), (b"\xff\x0a", "JPEG XL"), (b"\x00\x00\x00\x0cJXL ", "JPEG XL"),
    (b"PK\x03\x04", "ZIP archive"), (b"<svg", "SVG"), (b"<?xml", "XML/SVG"),
)
_HEIF_BRANDS = {b"heic": "HEIC", b"heix": "HEIC", b"mif1": "HEIF", b"msf1": "HEIF",
                b"hevc": "HEIC", b"avif": "AVIF", b"avis": "AVIF"}


# ---------------------------------------------------------------------------
# sRGB decode
# ---------------------------------------------------------------------------

@functools.lru_cache(maxsize=None)
def _lut(bit_depth: int, dtype: str) -> np.ndarray:
    code = np.arange(2**bit_depth, dtype=np.float64) / (2**bit_depth - 1)
    lin = np.where(code <= 0.04045, code / 12.92, ((code + 0.055) / 1.055) ** 2.4)
    lut = lin.astype(dtype)
    lut.flags.writeable = False
    return lut


def srgb_decode_lut(bit_depth: int, dtype=np.float32) -> np.ndarray:
    """Lookup table from sRGB code value to linear light.

    Parameters
    ----------
    bit_depth : {8, 16}
        Bits per channel: the table has 256 or 65536 entries.
    dtype : numpy dtype
        ``float32`` (what :meth:`Photo.linear_rgb` uses) or ``float64``.

    Returns
    -------
    numpy.ndarray
        Read-only (2**bit_depth,) array: entry c is the linear value 0..1 of code
        c, with v = c / (2**bit_depth - 1) decoded as v / 12.92 for v <= 0.04045
        and ((v + 0.055) / 1.055) ** 2.4 above.

    References
    ----------
    IEC 61966-2-1:1999, the sRGB transfer function (decoding direction).
    """
    if bit_depth not in (8, 16):
        raise InputError(f"bit_depth = {bit_depth!r} is not allowed; give 8 or 16.")
    name = np.dtype(dtype).name
    if name not in ("float32", "float64"):
        raise InputError(f"dtype = {name} is not allowed; give float32 or float64.")
    return _lut(bit_depth, name)


# ---------------------------------------------------------------------------
# Photo
# ---------------------------------------------------------------------------

@dataclass(frozen=True, eq=False)
class Photo:
    """An upright RGB photo as the file's own code values.

    Attributes
    ----------
    rgb : numpy.ndarray
        (height, width, 3) array, rows top to bottom, columns left to right,
        channels R, G, B; dtype uint8 (``bit_depth`` 8) or uint16 (16), exactly
        the file's code values (16-bit files are not reduced). Read-only when
        made by :func:`load_image`.
    bit_depth : int
        8 or 16 bits per channel.
    width, height : int
        Size in pixels of the upright image (``rgb.shape[1]``, ``rgb.shape[0]``).
    source_format : str
        ``"JPEG"``, ``"PNG"``, ``"TIFF"`` or ``"array"``.
    orientation_applied : bool
        True when the file carried an EXIF orientation other than "upright"
        (values 2-8) and the pixels were turned and/or mirrored to match it.
    linear : bool
        True when the code values are linear light (proportional to the light
        on the sensor: a linear 16-bit TIFF, a camera RAW); False when they are
        sRGB-encoded (JPEG, PNG, an 8-bit TIFF). See :func:`load_image` for how
        it is judged.
    decoding : str
        How the pixels were read, in words for the page, e.g. ``"8-bit JPEG,
        sRGB decode"`` or ``"16-bit TIFF, linear"``; filled from the other
        fields when not given.
    """

    rgb: np.ndarray
    bit_depth: int
    width: int
    height: int
    source_format: str
    orientation_applied: bool = False
    linear: bool = False
    decoding: str = ""

    def __post_init__(self):
        rgb = self.rgb
        if not isinstance(rgb, np.ndarray) or rgb.ndim != 3 or rgb.shape[2] != 3:
            shape = getattr(rgb, "shape", None)
            raise InputError(f"Photo.rgb must be a (height, width, 3) numpy array, got shape {shape}.")
        want = {8: np.uint8, 16: np.uint16}.get(self.bit_depth)
        if want is None:
            raise InputError(f"Photo.bit_depth = {self.bit_depth!r} is not allowed; give 8 or 16.")
        if rgb.dtype != want:
            raise InputError(f"Photo.rgb has dtype {rgb.dtype} but bit_depth is {self.bit_depth}; "
                             f"give {np.dtype(want).name}.")
        if (self.height, self.width) != rgb.shape[:2]:
            raise InputError(f"Photo width x height = {self.width} x {self.height} does not match "
                             f"rgb.shape {rgb.shape} (height, width, 3).")
        if self.source_format not in FORMATS + ("array",):
            raise InputError(f"Photo.source_format = {self.source_format!r} is not allowed; "
                             f"give one of {', '.join(FORMATS + ('array',))}.")
        if not isinstance(self.linear, (bool, np.bool_)):
            raise InputError(f"Photo.linear = {self.linear!r} is not allowed; give True (linear light) "
                             "or False (sRGB-encoded code values).")
        object.__setattr__(self, "linear", bool(self.linear))
        if not isinstance(self.decoding, str):
            raise InputError(f"Photo.decoding = {self.decoding!r} is not allowed; give a short text.")
        if not self.decoding:
            what = "array" if self.source_format == "array" else self.source_format
            how = "linear" if self.linear else "sRGB decode"
            object.__setattr__(self, "decoding", f"{self.bit_depth}-bit {what}, {how}")

    @property
    def max_code(self) -> int:
        """Largest code value: 255 for 8 bits, 65535 for 16 bits."""
        return 2**self.bit_depth - 1

    def linear_rgb(self, box=None) -> np.ndarray:
        """Linear-light RGB of every pixel, or of the pixels of one box.

        Parameters
        ----------
        box : (x0, y0, x1, y1) or None
            Pixel box (x right, y down, ends exclusive) to decode alone; None = the whole photo.

        Returns
        -------
        numpy.ndarray
            New float32 (height, width, 3) array (the box's size with ``box``) of values 0..1: code / max_code
            when :attr:`linear`, else each code value decoded with the sRGB
            transfer function through a 256- or 65536-entry lookup table
            (:func:`srgb_decode_lut`).

        References
        ----------
        IEC 61966-2-1:1999, the sRGB transfer function.
        """
        rgb = self.rgb if box is None else self.rgb[box[1]:box[3], box[0]:box[2]]
        return self.decode_lut(np.float32)[rgb]

    def decode_lut(self, dtype=np.float32) -> np.ndarray:
        """(max_code + 1,) table from code value to linear light 0..1 for this photo:
        :func:`srgb_decode_lut` for sRGB-encoded values, code / max_code for linear ones."""
        return _linear_lut(self.bit_depth, np.dtype(dtype).name) if self.linear else srgb_decode_lut(self.bit_depth, dtype)


@functools.lru_cache(maxsize=None)
def _linear_lut(bit_depth: int, dtype: str) -> np.ndarray:
    lut = (np.arange(2**bit_depth, dtype=np.float64) / (2**bit_depth - 1)).astype(dtype)
    lut.flags.writeable = False
    return lut


# ---------------------------------------------------------------------------
# Loading
# ---------------------------------------------------------------------------

def load_image(source, *, max_pixels: int = MAX_PIXELS, max_bytes: int = MAX_BYTES, linear=None) -> Photo:
    """Load a photo from bytes, a file path or an array, checking it on the way.

    Linear or sRGB: with ``linear=None`` (the default) the file decides. A camera RAW or DNG is linear
    (LibRaw renders it with :data:`RAW_POSTPROCESS`: camera RGB, no tone curve, no white balance). A 16-bit
    TIFF is linear unless it carries an ICC profile (tag 34675) or says sRGB in its EXIF ColorSpace tag
    (scientific and inspection cameras write linear 16-bit TIFF without a profile; image editors embed the
    profile of an encoded colour space). JPEG, PNG and 8-bit TIFF are sRGB-encoded, and so is an array.
    ``linear=True`` or ``False`` overrides the file. :attr:`Photo.decoding` says which way was taken.

    Parameters
    ----------
    source : bytes, bytearray, memoryview, str, os.PathLike or numpy.ndarray
        The file's content, a path to a JPEG, PNG or TIFF file, or an
        (height, width, 3) array of uint8 or uint16 sRGB code values (copied).
    max_pixels : int
        Most pixels (width x height) accepted; checked from the header before
        any pixel is decoded. Pillow refuses headers above twice its own
        ``Image.MAX_IMAGE_PIXELS`` whatever this says.
    max_bytes : int
        Largest file accepted, bytes; checked before the file is read.
    linear : None, True or False
        Whether the code values are linear light: None = judged from the file (above).

    Returns
    -------
    Photo
        Upright RGB code values, 8 or 16 bits per channel as stored. A palette
        image is expanded to RGB; an alpha channel that is fully opaque is
        dropped.

    Raises
    ------
    InputError
        For an empty, oversized, damaged or truncated file; a file that is not
        JPEG, PNG or TIFF; a greyscale, black-and-white, CMYK or other non-RGB
        image; any pixel that is not fully opaque; fewer than 2 x 2 or more than
        ``max_pixels`` pixels; an array of the wrong shape or dtype or holding
        NaN. The message says what was wrong and how to fix it.
    """
    max_pixels = _positive_int("max_pixels", max_pixels)
    max_bytes = _positive_int("max_bytes", max_bytes)
    if linear is not None and not isinstance(linear, (bool, np.bool_)):
        raise InputError(f"linear = {linear!r} is not allowed; give None (judged from the file), True (linear "
                         "light) or False (sRGB-encoded).")
    photo = _load(source, max_pixels, max_bytes, linear)
    if linear is not None and bool(linear) != photo.linear:
        how = "linear, as told" if linear else "sRGB decode, as told"
        photo = Photo(rgb=photo.rgb, bit_depth=photo.bit_depth, width=photo.width, height=photo.height,
                      source_format=photo.source_format, orientation_applied=photo.orientation_applied,
                      linear=bool(linear), decoding=f"{photo.decoding.split(', ')[0]}, {how}")
    return photo


def _load(source, max_pixels: int, max_bytes: int, linear) -> Photo:
    if isinstance(source, np.ndarray):
        return _from_array(source, max_pixels)
    if isinstance(source, (bytes, bytearray, memoryview)):
        data = source
        if isinstance(data, memoryview):
            if data.nbytes > max_bytes:
                raise InputError(_too_many_bytes(data.nbytes, max_bytes))
            data = data.tobytes()
        return _from_bytes(bytes(data), max_pixels, max_bytes)
    if isinstance(source, (str, os.PathLike)):
        raw = str(source).lower().endswith(RAW_EXTENSIONS)
        return _from_bytes(_read_file(source, max_bytes), max_pixels, max_bytes, raw)
    raise InputError(f"Cannot load an image from a {type(source).__name__}: give the file's "
                     "bytes, a path to a JPEG, PNG or TIFF file, or a (height, width, 3) "
                     "uint8/uint16 numpy array.")


def _positive_int(name: str, value) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
        raise InputError(f"{name} = {value!r} is not allowed; give a whole number >= 1.")
    return int(value)


def _mb(n: int) -> str:
    return f"{n / 1e6:.1f} MB"


def _too_many_bytes(n: int, limit: int) -> str:
    return (f"The file is {_mb(n)} ({n:,} bytes); the limit is {_mb(limit)} ({limit:,} bytes). "
            "Crop the photo to the part, export it at a smaller size, or save it as JPEG, and "
            "try again.")


def _read_file(source, max_bytes: int) -> bytes:
    """The bytes of the file at ``source``; messages name the file only, never the folders above it."""
    try:
        path = Path(source)
        name = repr(path.name or str(source))
        st = path.stat()
    except FileNotFoundError:
        raise InputError(f"There is no file {name}: check the path and the file name.") from None
    except (OSError, ValueError) as exc:
        raise InputError(f"Cannot read {name} ({_reason(exc)}): check the path and that the "
                         "file can be read.") from None
    if stat.S_ISDIR(st.st_mode):
        raise InputError(f"{name} is a folder, not a file: choose the photo file inside it.")
    if not stat.S_ISREG(st.st_mode):
        raise InputError(f"{name} is not a regular file: choose a JPEG, PNG or TIFF photo file.")
    if st.st_size > max_bytes:
        raise InputError(_too_many_bytes(st.st_size, max_bytes))
    try:
        with open(path, "rb") as fh:
            data = fh.read(max_bytes + 1)
    except OSError as exc:
        raise InputError(f"Cannot read {name} ({_reason(exc)}): check that the file can be read.") from None
    if len(data) > max_bytes:  # the file grew after stat
        raise InputError(_too_many_bytes(len(data), max_bytes))
    return data


def _reason(exc: Exception) -> str:
    """Why a file could not be read, without the path an OSError's text carries."""
    return getattr(exc, "strerror", None) or (str(exc) if isinstance(exc, ValueError) else type(exc).__name__)


def _sniff(data: bytes) -> str | None:
    """The format by the file's first bytes: one of FORMATS, another name, or None."""
    if data.startswith(b"\xff\xd8\xff"):
        return "JPEG"
    if data.startswith(b"\x89PNG\r\n\x1a\n"):
        return "PNG"
    if data[:4] in (b"II*\x00", b"MM\x00*", b"II+\x00", b"MM\x00+"):
        return "TIFF"
    if data[:4] == b"RIFF" and data[8:12] == b"WEBP":
        return "WebP"
    if data[4:8] == b"ftyp" and data[8:12] in _HEIF_BRANDS:
        return _HEIF_BRANDS[data[8:12]]
    for signature, name in _OTHER_SIGNATURES:
        if data.startswith(signature):
            return name
    return None


def _from_bytes(data: bytes, max_pixels: int, max_bytes: int, raw: bool = False) -> Photo:
    if not data:
        raise InputError("The file is empty (0 bytes): choose a JPEG, PNG or TIFF photo.")
    if len(data) > max_bytes:
        raise InputError(_too_many_bytes(len(data), max_bytes))
    if raw or _is_raw(data):
        return _from_raw(data, max_pixels)
    fmt = _sniff(data)
    if fmt is None:
        raise InputError("The file is not a JPEG, PNG or TIFF image (its first bytes match none "
                         "of them). " + _EXPORT_HINT)
    if fmt not in FORMATS:
        raise InputError(f"The file is a {fmt} file; this tool reads JPEG, PNG and TIFF only (and camera "
                         "RAW/DNG). " + _EXPORT_HINT)
    if fmt == "PNG":
        _check_png_chunks(data)
    if fmt == "TIFF" and not _pillow_opens(data):
        return _from_tifffile(data, max_pixels)
    with warnings.catch_warnings():
        # The pixel limit is checked here with max_pixels, and a damaged tag or
        # EXIF block that Pillow skips with a warning is either harmless or
        # fails the decode below; neither needs a warning in the server log.
        warnings.simplefilter("ignore", Image.DecompressionBombWarning)
        warnings.filterwarnings("ignore", category=UserWarning, module=r"PIL(\.|$)")
        im = _open(data, fmt, max_pixels)
        try:
            width, height = im.size
            _check_size(width, height, max_pixels)
            # Pillow turns a TIFF upright itself while loading it and then drops
            # the tag; other formats keep the tag and are turned here.
            stored = _valid_orientation(im.tag_v2.get(0x0112)) if fmt == "TIFF" else 1
            planar16 = fmt == "TIFF" and _planar_16bit(im)
            if planar16:                                      # Pillow cannot: tifffile reads it
                rgb = _decode_tifffile(data, width, height)
            else:
                _check_mode(im, fmt)
                rgb = _decode(im, data, fmt)
            orientation = _orientation(im) if not planar16 else stored
            linear = fmt == "TIFF" and rgb.dtype == np.uint16 and _tiff_says_linear(im)
        except InputError:
            raise
        except MemoryError:
            raise InputError(f"There is not enough memory to decode this {width} x {height} "
                             "image: export it at a smaller size and try again.") from None
        except Exception as exc:  # any decoder failure on a bad file
            raise InputError(_broken(fmt, exc)) from None
        finally:
            im.close()
    if rgb.shape[:2] != (height, width):
        raise InputError(f"The {fmt} file decoded to {rgb.shape[1]} x {rgb.shape[0]} pixels but "
                         f"its header says {width} x {height}: the file is damaged. "
                         "Re-export it and try again.")
    rgb = _transpose(rgb, orientation)
    rgb = np.ascontiguousarray(rgb)
    rgb.flags.writeable = False
    bits = 8 if rgb.dtype == np.uint8 else 16
    reader = " (tifffile)" if planar16 else ""
    return Photo(rgb=rgb, bit_depth=bits, width=rgb.shape[1], height=rgb.shape[0], source_format=fmt,
                 orientation_applied=orientation != 1 or stored != 1, linear=linear,
                 decoding=f"{bits}-bit {fmt}{reader}, " + ("linear" if linear else "sRGB decode"))


def _planar_16bit(im: Image.Image) -> bool:
    """A TIFF of 16-bit samples stored plane by plane (planar configuration 2), from its header."""
    bits = im.tag_v2.get(258, (8,))
    bits = bits if isinstance(bits, tuple) else (bits,)
    return im.tag_v2.get(284, 1) == 2 and any(b == 16 for b in bits)


def _decode_tifffile(data: bytes, width: int, height: int) -> np.ndarray:
    """A planar 16-bit RGB(A) TIFF's first image as (height, width, 3) uint16, read by tifffile (the size
    was checked from the header already); opaque alpha dropped, transparency refused."""
    import tifffile

    with tifffile.TiffFile(io.BytesIO(data)) as tif:
        page = tif.pages.first
        shape, dtype = tuple(page.shape), page.dtype
        if dtype != np.uint16 or len(shape) != 3 or shape[0] not in (3, 4) or shape[1:] != (height, width):
            raise InputError(f"This 16-bit TIFF stores its planes as {shape} {dtype}, a layout this tool does "
                             "not read. " + _EXPORT_HINT)
        px = page.asarray()
    px = np.moveaxis(px, 0, -1)
    if px.shape[2] == 4:
        _check_opaque(px[..., 3] != 65535)
        px = px[..., :3]
    return px


def _pillow_opens(data: bytes) -> bool:
    """Whether Pillow takes the TIFF's header (a header too large for it counts: it is refused later)."""
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            Image.open(io.BytesIO(data), formats=["TIFF"]).close()
    except Image.DecompressionBombError:
        return True
    except Exception:
        return False
    return True


def _from_tifffile(data: bytes, max_pixels: int) -> Photo:
    """An RGB(A) TIFF that Pillow cannot open (16-bit planes stored apart, as tifffile writes them), read by
    tifffile: the size is checked from the header before any pixel is read; orientation is applied here."""
    import tifffile

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            with tifffile.TiffFile(io.BytesIO(data)) as tif:
                page = tif.pages.first
                width, height = int(page.imagewidth), int(page.imagelength)
                if width < MIN_SIDE or height < MIN_SIDE:             # no image tifffile can find either
                    raise InputError(_broken("TIFF", f"its first image is {width} x {height} pixels"))
                _check_size(width, height, max_pixels)
                samples, bits = int(page.samplesperpixel), int(page.bitspersample)
                if int(page.photometric) != 2 or samples not in (3, 4) or bits not in (8, 16):
                    raise InputError(f"This TIFF stores {samples} samples of {bits} bits (photometric "
                                     f"{int(page.photometric)}), a layout this tool does not read. " + _EXPORT_HINT)
                tags = {t.code: t.value for t in page.tags.values() if t.code in (274, 34675)}
                px = page.asarray()
    except InputError:
        raise
    except MemoryError:
        raise InputError("There is not enough memory to decode this TIFF: export it at a smaller size and "
                         "try again.") from None
    except Exception as exc:
        raise InputError(_broken("TIFF", exc)) from None
    if px.ndim == 3 and px.shape[0] == samples and px.shape[1:] == (height, width):
        px = np.moveaxis(px, 0, -1)
    if px.shape != (height, width, samples):
        raise InputError(f"The TIFF file decoded to {px.shape} but its header says {width} x {height} x "
                         f"{samples}: the file is damaged. Re-export it and try again.")
    if samples == 4:
        _check_opaque(px[..., 3] != (2**bits - 1))
        px = px[..., :3]
    orientation = _valid_orientation(tags.get(274, 1))
    rgb = np.ascontiguousarray(_transpose(px, orientation))
    rgb.flags.writeable = False
    linear = bits == 16 and 34675 not in tags
    return Photo(rgb=rgb, bit_depth=bits, width=rgb.shape[1], height=rgb.shape[0], source_format="TIFF",
                 orientation_applied=orientation != 1, linear=linear,
                 decoding=f"{bits}-bit TIFF (tifffile), " + ("linear" if linear else "sRGB decode"))


def _tiff_says_linear(im: Image.Image) -> bool:
    """A 16-bit TIFF is linear light unless it embeds an ICC profile or its EXIF ColorSpace says sRGB."""
    if 34675 in im.tag_v2 or im.info.get("icc_profile"):
        return False
    try:
        space = im.getexif().get_ifd(0x8769).get(0xA001)
    except Exception:  # a damaged EXIF block says nothing
        space = None
    return space != 1


def _is_raw(data: bytes) -> bool:
    """A camera RAW by its first bytes: RAF, ORF or RW2 signatures; CR3 (ISO box 'crx '); or a TIFF-shaped
    file whose first directory is a DNG's (DNGVersion tag 50706, or colour-filter-array / linear-raw
    photometric 32803 / 34892), a Canon CR2's ('CR' at byte 8), or a camera's with a reduced first image
    and sub-images (NEF, ARW, PEF: NewSubfileType 1 with SubIFDs and Make)."""
    if data.startswith(_RAW_SIGNATURES) or (data[4:8] == b"ftyp" and data[8:12] == b"crx "):
        return True
    if data[:4] not in (b"II*\x00", b"MM\x00*"):
        return False
    if data[8:10] == b"CR":
        return True
    tags = _tiff_ifd0(data)
    return (50706 in tags or tags.get(262) in (32803, 34892)
            or (tags.get(254) == 1 and 330 in tags and 271 in tags))


#: Most entries read from a TIFF's first directory when looking for RAW tags (cameras write a few dozen).
_MAX_IFD_ENTRIES = 4096


def _tiff_ifd0(data: bytes) -> dict:
    """Tags of a classic TIFF's first directory: {tag: first value for SHORT/LONG/BYTE, else None}."""
    order = "<" if data[:2] == b"II" else ">"
    try:
        pos = int.from_bytes(data[4:8], "little" if order == "<" else "big")
        n = int.from_bytes(data[pos:pos + 2], "little" if order == "<" else "big")
    except (ValueError, IndexError):
        return {}
    if pos + 2 + 12 * min(n, _MAX_IFD_ENTRIES) > len(data):
        return {}
    tags = {}
    end = "little" if order == "<" else "big"
    for k in range(min(n, _MAX_IFD_ENTRIES)):
        e = pos + 2 + 12 * k
        tag, kind = int.from_bytes(data[e:e + 2], end), int.from_bytes(data[e + 2:e + 4], end)
        value = None
        if kind == 3:
            value = int.from_bytes(data[e + 8:e + 10], end)
        elif kind == 4:
            value = int.from_bytes(data[e + 8:e + 12], end)
        elif kind == 1:
            value = data[e + 8]
        tags[tag] = value
    return tags


def _raw_failed(detail: str) -> str:
    detail = " ".join(str(detail).split())[:160]
    return (f"The camera RAW file could not be read by LibRaw{f' ({detail})' if detail else ''}: it is damaged, "
            "truncated, or from a camera LibRaw does not know. Copy it from the card again, or export it from "
            "the camera's software as a 16-bit linear TIFF (no tone curve, no white balance), and retry.")


def _from_raw(data: bytes, max_pixels: int) -> Photo:
    """A camera RAW or DNG rendered by LibRaw (rawpy) as linear camera RGB, 16 bits (:data:`RAW_POSTPROCESS`).

    The sizes are read from the file's header (LibRaw's open, which decodes no pixel) and checked against
    ``max_pixels`` before the pixels are unpacked. LibRaw subtracts the black level and scales the white
    level to 65535; LibRaw applies the file's orientation.

    References
    ----------
    LibRaw API, libraw_output_params_t (gamm, no_auto_bright, use_camera_wb, user_mul, output_color 0 =
    raw colour); Adobe DNG Specification 1.4 (2012).
    """
    try:
        import rawpy
    except ImportError:
        raise InputError("Reading camera RAW files needs the rawpy package (LibRaw), which is not installed: "
                         "install it (pip install rawpy) or export the photo as a 16-bit linear TIFF.") from None
    try:
        raw = rawpy.imread(io.BytesIO(data))
    except MemoryError:
        raise InputError("There is not enough memory to open this camera RAW file: export it as a 16-bit "
                         "TIFF and try again.") from None
    except Exception as exc:  # LibRawError and its kinds, for any file LibRaw refuses
        raise InputError(_raw_failed(str(exc) or type(exc).__name__)) from None
    try:
        sizes = raw.sizes
        _check_size(int(sizes.raw_width), int(sizes.raw_height), max_pixels)
        _check_size(int(sizes.width), int(sizes.height), max_pixels)
        try:
            rgb = raw.postprocess(output_color=rawpy.ColorSpace.raw, **RAW_POSTPROCESS)
        except MemoryError:
            raise InputError(f"There is not enough memory to decode this {sizes.width} x {sizes.height} camera "
                             "RAW file: export it at a smaller size and try again.") from None
        except Exception as exc:
            raise InputError(_raw_failed(str(exc) or type(exc).__name__)) from None
        flip = int(sizes.flip)
    finally:
        raw.close()
    rgb = np.asarray(rgb)
    if rgb.ndim != 3 or rgb.shape[2] != 3 or rgb.dtype != np.uint16:
        raise InputError(_raw_failed(f"it decoded to {rgb.shape} {rgb.dtype}, not RGB"))
    _check_size(rgb.shape[1], rgb.shape[0], max_pixels)
    rgb = np.ascontiguousarray(rgb)
    rgb.flags.writeable = False
    return Photo(rgb=rgb, bit_depth=16, width=rgb.shape[1], height=rgb.shape[0], source_format="RAW",
                 orientation_applied=flip not in (0, -1), linear=True,
                 decoding="16-bit camera RAW (LibRaw via rawpy), linear camera RGB, no tone curve or white balance")


def _check_png_chunks(data: bytes) -> None:
    """Refuse a PNG whose chunks do not run whole, with matching checksums, to the end marker IEND.

    Pillow takes a PNG cut anywhere after the last compressed block of its image data (in the stream's
    own checksum, the chunk's CRC or IEND) and never needs IEND; so a file cut short, or damaged, is
    found here from its chunk structure (W3C PNG specification, sec. 5.3: length, type, data, CRC-32 of type
    and data) before any pixel is decoded. At most :data:`MAX_PNG_CHUNKS` chunks are walked.
    """
    view = memoryview(data)
    again = "Copy or export the photo again and retry."
    pos, n = 8, len(data)
    for _ in range(MAX_PNG_CHUNKS):
        if pos + 8 > n:
            raise InputError(f"The PNG file is truncated or damaged: it stops at byte {n:,} without its end "
                             f"marker (IEND), so part of the image is missing. {again}")
        length = int.from_bytes(view[pos:pos + 4], "big")
        kind = bytes(view[pos + 4:pos + 8])
        name = kind.decode("latin-1") if kind.isalpha() else repr(kind)
        if length > 2**31 - 1:
            raise InputError(f"The PNG file is damaged: its chunk at byte {pos:,} gives an impossible length. "
                             + again)
        end = pos + 12 + length
        if end > n:
            raise InputError(f"The PNG file is truncated or damaged: it stops at byte {n:,}, inside its {name} "
                             f"chunk, so part of the image is missing. {again}")
        if zlib.crc32(view[pos + 4:end - 4]) != int.from_bytes(view[end - 4:end], "big"):
            raise InputError(f"The PNG file is damaged: the checksum of its {name} chunk at byte {pos:,} does "
                             f"not match its content. {again}")
        if kind == b"IEND":
            return
        pos = end
    raise InputError(f"The PNG file has more than {MAX_PNG_CHUNKS:,} chunks; image programs write far fewer. "
                     f"Export the photo again as PNG, JPEG or TIFF and retry.")


def _broken(fmt: str, exc: BaseException) -> str:
    detail = " ".join(str(exc).split())[:160]
    detail = f" ({detail})" if detail else ""
    return (f"The {fmt} file could not be decoded: it is damaged, truncated or uses a layout "
            f"this tool does not read{detail}. Copy or export it again as an RGB JPEG, PNG or "
            "TIFF and retry.")


def _open(data: bytes, fmt: str, max_pixels: int) -> Image.Image:
    """Pillow's lazy open (header only), restricted to ``fmt``; errors become InputError."""
    try:
        im = Image.open(io.BytesIO(data), formats=[fmt])
    except Image.DecompressionBombError as exc:
        found = re.search(r"\((\d+) pixels\)", str(exc))
        size = f"{int(found.group(1)) / 1e6:,.1f} megapixels" if found else "too many pixels"
        max_pixels = min(max_pixels, 2 * (Image.MAX_IMAGE_PIXELS or max_pixels))
        raise InputError(f"The image has {size}; the limit is {_pixel_limit(max_pixels)}. "
                         "Crop it to the part or export it at a smaller size.") from None
    except MemoryError:
        raise InputError("There is not enough memory to open this image: export it at a smaller "
                         "size and try again.") from None
    except Exception as exc:
        raise InputError(_broken(fmt, exc)) from None
    if im.format not in (fmt, "MPO" if fmt == "JPEG" else fmt):
        im.close()
        raise InputError(f"The file looks like {fmt} but was read as {im.format}. " + _EXPORT_HINT)
    return im


def _pixel_limit(max_pixels: int) -> str:
    if max_pixels >= 100_000:
        return f"{max_pixels / 1e6:,.1f} megapixels ({max_pixels:,} pixels)"
    return f"{max_pixels:,} pixels"


def _check_size(width: int, height: int, max_pixels: int) -> None:
    pixels = width * height
    if pixels > max_pixels:
        raise InputError(
            f"The image is {width} x {height} pixels ({pixels / 1e6:,.1f} megapixels); the limit "
            f"is {_pixel_limit(max_pixels)}. Crop it to the part or export it at a smaller size.")
    if width < MIN_SIDE or height < MIN_SIDE:
        raise InputError(
            f"The image is {width} x {height} pixels; at least {MIN_SIDE} x {MIN_SIDE} are "
            "needed. Choose the full photo, not a thumbnail or an icon.")


def _rawmodes(im: Image.Image) -> list:
    modes = []
    for tile in im.tile:
        args = tile[3]
        if isinstance(args, tuple):
            args = args[0] if args else None
        modes.append(args if isinstance(args, str) else None)
    return modes


def _is_16bit(im: Image.Image, fmt: str) -> bool:
    """Whether the RGB(A) image holds 16 bits per sample (from the header alone)."""
    rawmodes = _rawmodes(im)
    wide = [rm is not None and ";16" in rm for rm in rawmodes]
    if any(wide):
        if not all(wide) or not all(_RAW16.match(rm) for rm in rawmodes):
            raise InputError(f"This 16-bit {fmt} file uses a pixel layout this tool does not "
                             f"read ({', '.join(map(str, rawmodes))}). " + _EXPORT_HINT)
        return True
    if fmt == "TIFF":
        bits = im.tag_v2.get(258, (8,))
        bits = bits if isinstance(bits, tuple) else (bits,)
        if any(b != 8 for b in bits):
            raise InputError(f"This TIFF stores {'/'.join(map(str, bits))} bits per channel in a "
                             "layout this tool does not read. " + _EXPORT_HINT)
    return False


def _check_mode(im: Image.Image, fmt: str) -> None:
    mode = im.mode
    grey_raw = [rm for rm in _rawmodes(im) if rm and re.match(r"^(L|LA|La|I|F)(;|$)", rm)]
    if mode in _GREY_MODES or mode.startswith("I;16") or grey_raw:
        what = (f"greyscale (stored as {grey_raw[0]})" if grey_raw and mode not in _GREY_MODES
                else _GREY_MODES.get(mode, f"greyscale (mode {mode})"))
        raise InputError(f"The image is {what}: a thickness from colour needs a colour photo. "
                         "Export it as RGB.")
    if mode in _OTHER_COLOUR_MODES:
        raise InputError(f"The image is {_OTHER_COLOUR_MODES[mode]}: a thickness from colour needs "
                         "an RGB photo. Export it as RGB (sRGB).")
    if mode not in ("RGB", "RGBA", "RGBX", "P", "PA", "YCbCr"):
        raise InputError(f"The image has pixel mode {mode}, which this tool does not read. "
                         + _EXPORT_HINT)
    if fmt == "TIFF" and mode in ("RGB", "RGBA") and im.tag_v2.get(284, 1) == 2:
        bits = im.tag_v2.get(258, (8,))
        if any(b != 8 for b in (bits if isinstance(bits, tuple) else (bits,))):
            raise InputError("This 16-bit TIFF stores each colour in its own plane (planar "
                             "configuration 2), which this tool does not read. Save it with "
                             "interleaved (contiguous, RGBRGB...) channels, or as a 16-bit PNG.")


def _decode(im: Image.Image, data: bytes, fmt: str) -> np.ndarray:
    """Decode to (height, width, 3) uint8 or uint16, refusing transparency."""
    if im.mode in ("RGB", "RGBA", "RGBX") and _is_16bit(im, fmt):
        px = _decode_16bit(im, data, fmt)
        full = 65535
    else:
        im.load()
        if im.mode in ("P", "PA"):
            im = im.convert("RGBA")
        elif im.mode == "YCbCr":
            im = im.convert("RGB")
        px = np.asarray(im)
        full = 255
    if px.ndim != 3 or px.shape[2] not in (3, 4):
        raise InputError(f"The {fmt} file decoded to an array of shape {px.shape}, not RGB. "
                         + _EXPORT_HINT)
    if px.shape[2] == 4:
        if im.mode in ("RGBA", "PA", "P"):
            _check_opaque(px[..., 3] != full)
        px = px[..., :3]
    key = im.info.get("transparency")
    if isinstance(key, tuple) and len(key) == 3:  # PNG tRNS colour key on an RGB image
        _check_opaque(np.all(px == np.asarray(key, dtype=px.dtype), axis=-1)
                      if max(key) <= full else np.zeros(1, bool))
    return px


def _check_opaque(see_through: np.ndarray) -> None:
    n = int(np.count_nonzero(see_through))
    if n:
        raise InputError(
            f"The image has transparency: {n:,} of {see_through.size:,} pixels are not fully "
            "opaque, and a see-through pixel has no definite colour. Flatten it onto an opaque "
            "background or export it without transparency (RGB, no alpha channel).")


def _other_byte(tile, rawmode: str):
    match = _RAW16.match(rawmode)
    swapped = f"{match.group(1)};16{_OTHER_BYTE[match.group(2)]}"
    args = tile[3]
    args = (swapped,) + tuple(args[1:]) if isinstance(args, tuple) else swapped
    if hasattr(tile, "_replace"):
        return tile._replace(args=args)
    return (tile[0], tile[1], tile[2], args)


def _decode_16bit(im: Image.Image, data: bytes, fmt: str) -> np.ndarray:
    """16-bit RGB(A) as uint16: Pillow decodes the high bytes, then (re-opened with
    the opposite byte order) the low bytes; the two are joined.

    Pillow's decoders undo the file's compression and filters at full 16-bit
    precision and keep one byte of each sample when unpacking, so the two passes
    give exact high and low bytes. For premultiplied alpha ("RGBa") the
    unpacker divides by alpha, which is the identity only for opaque pixels;
    other pixels are refused as transparent anyway.
    """
    rawmodes = _rawmodes(im)
    im.load()
    high = np.asarray(im)
    other = _open(data, fmt, 2**62)
    try:
        if _rawmodes(other) != rawmodes or other.mode != im.mode or other.size != im.size:
            raise InputError(f"This 16-bit {fmt} file could not be read consistently. " + _EXPORT_HINT)
        other.tile = [_other_byte(t, rm) for t, rm in zip(other.tile, rawmodes)]
        other.load()
        low = np.asarray(other)
    finally:
        other.close()
    if high.shape != low.shape:
        raise InputError(f"This 16-bit {fmt} file could not be read consistently. " + _EXPORT_HINT)
    out = high.astype(np.uint16)
    out <<= 8
    out |= low
    return out


def _orientation(im: Image.Image) -> int:
    """EXIF orientation 1-8, or 1 when absent or unreadable."""
    try:
        value = im.getexif().get(0x0112, 1)
    except Exception:  # a damaged EXIF block does not spoil the pixels
        return 1
    return _valid_orientation(value)


def _valid_orientation(value) -> int:
    if isinstance(value, (tuple, list)) and len(value) == 1:
        value = value[0]
    ok = isinstance(value, (int, np.integer)) and not isinstance(value, bool) and 1 <= value <= 8
    return int(value) if ok else 1


def _transpose(rgb: np.ndarray, orientation: int) -> np.ndarray:
    """Turn stored pixels upright for EXIF orientation 1-8 (views, no copy).

    Same result as ``PIL.ImageOps.exif_transpose``: 2 mirror left-right, 3 turn
    180 deg, 4 mirror top-bottom, 5 transpose, 6 turn 90 deg clockwise,
    7 transverse, 8 turn 90 deg anticlockwise.
    """
    if orientation == 2:
        return rgb[:, ::-1]
    if orientation == 3:
        return rgb[::-1, ::-1]
    if orientation == 4:
        return rgb[::-1]
    if orientation == 5:
        return rgb.transpose(1, 0, 2)
    if orientation == 6:
        return rgb[::-1].transpose(1, 0, 2)
    if orientation == 7:
        return rgb[::-1, ::-1].transpose(1, 0, 2)
    if orientation == 8:
        return rgb[:, ::-1].transpose(1, 0, 2)
    return rgb


def _from_array(a: np.ndarray, max_pixels: int) -> Photo:
    if a.dtype.kind in "fc":
        if np.isnan(a).any():
            raise InputError("The array contains NaN values; give finite sRGB code values as a "
                             "uint8 (0..255) or uint16 (0..65535) array.")
    if a.ndim != 3 or a.shape[2] != 3:
        hint = ""
        if a.ndim == 2:
            hint = " A 2-D array is greyscale: a thickness from colour needs RGB."
        elif a.ndim == 3 and a.shape[2] == 4:
            hint = " Drop the alpha channel (a[..., :3]) if every pixel is opaque."
        elif a.ndim == 3 and a.shape[0] in (3, 4):
            hint = " Channels first? Move them last (np.moveaxis(a, 0, -1))."
        raise InputError(f"The array has shape {a.shape}; give (height, width, 3) RGB.{hint}")
    if a.dtype.kind != "u" or a.dtype.itemsize not in (1, 2):
        hint = ""
        if a.dtype.kind == "f":
            hint = (" For values 0..1 use np.round(a * 255).astype(np.uint8) "
                    "(or * 65535 and np.uint16).")
        raise InputError(f"The array has dtype {a.dtype}; give uint8 (0..255) or uint16 "
                         f"(0..65535) sRGB code values.{hint}")
    height, width = a.shape[:2]
    _check_size(width, height, max_pixels)
    rgb = np.array(a, dtype=np.uint8 if a.dtype.itemsize == 1 else np.uint16, order="C", copy=True)
    rgb.flags.writeable = False
    return Photo(rgb=rgb, bit_depth=8 * a.dtype.itemsize, width=width, height=height,
                 source_format="array", orientation_applied=False)


# ---------------------------------------------------------------------------
# Boxes
# ---------------------------------------------------------------------------

# Rows per chunk so temporaries stay near 2**20 pixels.
_CHUNK_PIXELS = 2**20


def _check_box(photo: Photo, box) -> tuple[int, int, int, int]:
    size = f"the image is {photo.width} x {photo.height} pixels (x 0..{photo.width}, y 0..{photo.height})"
    try:
        values = list(box)
    except TypeError:
        raise InputError(f"box = {box!r} is not allowed; give (x0, y0, x1, y1) in pixels, {size}.") from None
    if len(values) != 4:
        raise InputError(f"box = {box!r} has {len(values)} numbers; give 4: (x0, y0, x1, y1) in "
                         f"pixels, {size}.")
    out = []
    for name, v in zip(("x0", "y0", "x1", "y1"), values):
        if isinstance(v, (bool, np.bool_)):
            raise InputError(f"box {name} = {v!r} is not a pixel number; give whole numbers.")
        if isinstance(v, (int, np.integer)):
            out.append(int(v))
        elif isinstance(v, (float, np.floating)) and np.isfinite(v) and float(v).is_integer():
            out.append(int(v))
        else:
            raise InputError(f"box {name} = {v!r} is not allowed; give whole pixel numbers.")
    x0, y0, x1, y1 = out
    if x1 < x0 or y1 < y0:
        raise InputError(f"box = {tuple(out)} is inverted: x1 must be > x0 and y1 > y0 "
                         f"(x1, y1 exclusive); {size}.")
    if x1 == x0 or y1 == y0:
        raise InputError(f"box = {tuple(out)} is empty (x1, y1 are exclusive: a one-pixel box is "
                         f"(x, y, x + 1, y + 1)); {size}.")
    if x0 < 0 or y0 < 0 or x1 > photo.width or y1 > photo.height:
        raise InputError(f"box = {tuple(out)} reaches outside the image: {size}; keep "
                         f"0 <= x0 < x1 <= {photo.width} and 0 <= y0 < y1 <= {photo.height}.")
    return x0, y0, x1, y1


def _row_chunks(y0: int, y1: int, width: int):
    step = max(1, _CHUNK_PIXELS // max(1, width))
    for y in range(y0, y1, step):
        yield y, min(y + step, y1)


def box_mean_linear(photo: Photo, box) -> np.ndarray:
    """Mean linear-light RGB over a pixel box.

    Parameters
    ----------
    photo : Photo
        The loaded photo.
    box : sequence of 4 ints
        ``(x0, y0, x1, y1)`` in pixels of the upright image, x to the right and
        y down from the top-left corner; x1 and y1 are exclusive.

    Returns
    -------
    numpy.ndarray
        (3,) float64 mean of the linear-light values (0..1; sRGB-decoded, or
        code / max_code for a linear photo), channels R, G, B.

    Raises
    ------
    InputError
        When the box is not 4 whole numbers, is empty or inverted, or reaches
        outside the image (the message gives the image size).

    References
    ----------
    IEC 61966-2-1:1999, the sRGB transfer function.
    """
    x0, y0, x1, y1 = _check_box(photo, box)
    lut = photo.decode_lut(np.float64)
    total = np.zeros(3)
    for ya, yb in _row_chunks(y0, y1, x1 - x0):
        total += lut[photo.rgb[ya:yb, x0:x1]].sum(axis=(0, 1))
    return total / ((x1 - x0) * (y1 - y0))


def box_saturated_fraction(photo: Photo, box) -> float:
    """Fraction of pixels in a box with any channel at the largest code value.

    Parameters
    ----------
    photo : Photo
        The loaded photo.
    box : sequence of 4 ints
        ``(x0, y0, x1, y1)`` in pixels of the upright image, x1 and y1 exclusive.

    Returns
    -------
    float
        0..1: the share of pixels where R, G or B equals 255 (8-bit) or
        65535 (16-bit), i.e. clipped and not a true colour.

    Raises
    ------
    InputError
        As :func:`box_mean_linear`.
    """
    x0, y0, x1, y1 = _check_box(photo, box)
    full = photo.max_code
    count = 0
    for ya, yb in _row_chunks(y0, y1, x1 - x0):
        count += int(np.count_nonzero((photo.rgb[ya:yb, x0:x1] == full).any(axis=2)))
    return count / ((x1 - x0) * (y1 - y0))

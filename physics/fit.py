"""Thickness from a measured reflectance spectrum: import, a global fit that cannot miss the order,
an honest uncertainty, and the competing minima shown.

Method. Interference spectra have many local minima in thickness, one per fringe
order. The fit first scans the unknown thickness window densely (at least
:data:`SAMPLES_PER_FRINGE` samples per fringe at the shortest wavelength), solving the
optional scale and offset in closed form at every sample, using the O(1)-per-point
sweep of :mod:`physics.stack`; the best few local minima of the scan are then refined by
bounded non-linear least squares (scipy ``least_squares``). The uncertainty is the
square root of the diagonal of (JᵀJ)⁻¹·s², with J the Jacobian at the solution and
s² = SSR/(n − p) the residual variance (the curvature scaled by the residual). A
warning is raised when another minimum's rms lies within :data:`COMPETING_RMS_RATIO` of
the best.

The Fourier estimate: reflectance fringes are periodic in wavenumber 1/λ with period
1/(2·n·d·cos θ) (fringes of equal inclination, Born & Wolf, Principles of Optics,
sec. 7.5.1), so the strongest frequency of R(1/λ) estimates the optical thickness n·d.

References
----------
M. Born and E. Wolf, Principles of Optics, 7th ed., sec. 7.5.1; W. H. Press et al.,
Numerical Recipes, 3rd ed., sec. 15.5-15.6 (non-linear least squares, covariance from
the curvature); P. Virtanen et al., SciPy 1.0, Nat. Methods 17, 261 (2020).
"""

from __future__ import annotations

import re
import time
from dataclasses import dataclass, field

import numpy as np
from scipy.optimize import least_squares

from .errors import InputError, WavelengthRangeError, require_finite
from .stack import Stack, _check_layer_index, _Optics, sweep

__all__ = ["fit_thickness", "FitResult", "read_spectrum", "read_spectrum_table", "SpectrumData", "SpectrumTable",
           "reflectance_from_counts", "optical_thickness_fft", "noise_rms", "fit_thickness_reporting", "text_lines",
           "MIN_POINTS", "MAX_SPECTRUM_BYTES", "MAX_SPECTRUM_LINES", "MAX_LINE_CHARS", "SPECTRUM_READ_BUDGET_S"]

#: Fewest spectrum points accepted for a fit.
MIN_POINTS = 10
#: Scan samples per interference fringe at the shortest wavelength (a fringe then spans >= 8 samples).
SAMPLES_PER_FRINGE = 10
#: Largest scan, per unknown layer: a wider window than this resolves is refused.
MAX_SCAN_POINTS = 4000
#: Local minima of the scan refined by least squares.
STARTS_REFINED = 5
#: Another minimum whose rms is within this factor of the best is reported as competing.
COMPETING_RMS_RATIO = 1.5
#: Least-squares stopping tolerances (relative): 1e-8 of a micrometre is far below any uncertainty.
XTOL = 1e-8
FTOL = 1e-8
#: Model evaluations allowed to every start at first; a start not converged by then is finished only if
#: its sum of squares is within FINISH_COST_RATIO of the best (4x the competing ratio squared).
FIRST_NFEV = 20
FINISH_COST_RATIO = 4 * COMPETING_RMS_RATIO ** 2
#: Scan minima re-sampled finely before ranking, and fine samples across each (two scan steps).
FINE_CANDIDATES = 60
FINE_POINTS = 41
#: Quality of a fit. A right model leaves a residual equal to the measurement noise (reduced chi-square
#: near 1; Press et al., Numerical Recipes, 3rd ed., sec. 15.1). A residual rms above this multiple of the
#: noise (chi-square near 9) is a systematic misfit that noise cannot explain: the stated uncertainty then
#: covers the noise only. The noise is estimated from the spectrum itself (see :func:`noise_rms`), which
#: over-estimates it when few points sample each fringe, so the test errs towards leniency.
MISFIT_NOISE_RATIO = 3.0
#: ... and a residual rms above this fraction of the spectrum's own spread (standard deviation of the
#: measured reflectance) means the model does not reproduce the fringes at all: it explains less than
#: 1 - 0.5² = 75 % of the measured variation. Chosen on invented cases: right models give 0.03-0.2 (noise
#: 0.3-2 %), a flat model under strong fringes about 1, a wrong fixed underlayer 0.6-1, percent read as a
#: fraction far above 1.
POOR_FIT_SPREAD_RATIO = 0.5
#: Residuals below this rms (fraction) pass the misfit test whatever the noise: it is about the
#: repeatability of a good reflectometer (0.1 % reflectance; common practice), and it keeps noise-free or
#: coarsely rounded data from being judged against a noise estimate of zero.
RMS_TOLERANCE = 1e-3
#: Consistency factor of the median absolute deviation for normally distributed values (1/Φ⁻¹(3/4);
#: value recalled from memory; Rousseeuw & Croux, JASA 88, 1273 (1993)).
MAD_TO_SIGMA = 1.4826
#: Smallest uncertainty quoted (nm). A statistical 1σ below this says nothing about a film: it is a
#: thirtieth of an atomic layer (~0.3 nm; recalled from memory) and far below what the tabulated optical
#: constants support, so the quoted value is floored here and the floor is stated.
UNCERTAINTY_FLOOR_NM = 0.01
#: The Fourier estimate guides the window only when the band holds at least this many fringes (fewer are
#: not resolved; see :func:`optical_thickness_fft`).
FOURIER_MIN_FRINGES = 2.0
#: A window suggested from the Fourier estimate reaches this factor above it (the estimate's own error is a
#: few percent; measured in tests/test_fit_outside.py).
FOURIER_WINDOW_MARGIN = 1.1
#: Dense spectra: above this many points, neighbouring points are averaged in equal groups before the fit,
#: keeping at least :data:`BIN_POINTS_PER_FRINGE` points per fringe at the window's top (and at least
#: :data:`MIN_BINNED_POINTS`). Averaging m points of a fringe of period P over a width w shrinks it by
#: sinc(w/P) ≈ 1 - (πw/P)²/6, 0.2 % of the fringe amplitude at 30 points per fringe, well below the noise;
#: the fringe positions, which set the thickness, do not move. The fit then costs a fraction of the time.
MAX_FIT_POINTS = 2000
BIN_POINTS_PER_FRINGE = 30
MIN_BINNED_POINTS = 1000
#: Reflectance read as a fraction above this is refused (a percentage or counts, not a fraction).
MAX_FRACTION = 1.2
#: Detection of the value column: a largest value above this is not a fraction (a fraction stays below 1,
#: or a little above it against an imperfect reference), so the column is read as percent.
PERCENT_ABOVE = 1.5
#: ... and above this it is not a percentage either (measured reflectance stays near or below 100 %, even
#: against a reference mirror; common practice), so the column is read as raw detector counts.
COUNTS_ABOVE = 150.0
#: Wavelengths outside this band (nm) are implausible for a film reflectometer (deep UV to mid infrared,
#: generously; common practice): a unit choice that puts the data outside it gets a warning.
PLAUSIBLE_WAVELENGTH_NM = (100.0, 30_000.0)
#: Reflectance above this after the unit is applied is implausible (a percentage read as a fraction, or counts).
PLAUSIBLE_MAX_REFLECTANCE = PERCENT_ABOVE
#: Largest spectrum file read (bytes; 1 MB = 10**6 bytes throughout): two columns of a few thousand rows are
#: tens of kB, so this leaves room for exports with many columns.
MAX_SPECTRUM_BYTES = 20_000_000
#: Most lines read from a spectrum file (header, comments and data together); reading stops at the next one.
#: A spectrometer export has one row per detector pixel or wavelength step: 1024-4096 for an array
#: spectrometer, 901 for 200-1100 nm at 1 nm (common practice). 200,000 is a 0.005 nm step over 1000 nm, far
#: finer than a film fit uses (it averages dense spectra down to about MAX_FIT_POINTS).
MAX_SPECTRUM_LINES = 200_000
#: Longest line read from a text file of numbers (characters). Two numbers and a separator need a few dozen,
#: export headers a few hundred. A longer line is refused before it is split, so no split or pattern match
#: works on more than this: each is one C call that holds the interpreter lock while it runs.
MAX_LINE_CHARS = 4096
#: Time allowed for reading one spectrum file (s). MAX_SPECTRUM_LINES lines read in about 1 s on one core of
#: the 2-core lab machine (measured); ten times that leaves room for a busy server and still stops a read that
#: goes on far longer than any real file needs.
SPECTRUM_READ_BUDGET_S = 10.0
#: Lines between two progress reports while a text file is read (its time budget is checked every 1024).
PROGRESS_EVERY_LINES = 10_000
#: Lines between two hand-overs of the interpreter lock (``time.sleep(0)``) while a text file is read. A
#: thread running Python keeps the lock for the switch interval (5 ms) each time another thread asks for
#: it, and a server answering one request asks a few dozen times. Measured on the 2-core machine beside a
#: reading thread: twenty short waits, as in one request, took about 110 ms (median) without hand-overs,
#: 40 ms with one every 256 lines and 10 ms with one every 64. A hand-over is one system call (0.08 ms on
#: the busy machine), so reading 200,000 lines takes up to 0.25 s longer.
YIELD_EVERY_LINES = 64
#: Characters split into lines at a time, so no single split covers the whole text (more than any line allowed).
_LINE_BLOCK_CHARS = 1 << 16
#: Characters in which line breaks are counted before reading, to refuse a file of far too many lines at
#: once: one C call over at most this much text holds the interpreter lock for 10-30 ms (measured).
_COUNT_CHARS = 20_000_000
#: What str.splitlines ends a line at.
_LINE_ENDS = "\r\n\v\f\x1c\x1d\x1e\x85\u2028\u2029"


# ---------------------------------------------------------------------- import
@dataclass(frozen=True)
class SpectrumData:
    """A spectrum read from a file.

    Attributes
    ----------
    wavelength_nm, values : (n,) sorted by wavelength, duplicates averaged
    wavelength_unit : "nm" or "um" as detected (or given)
    value_unit : "fraction", "percent" or "counts" as detected (or given); ``reflectance`` applies it
    dropped_rows : rows without two numbers or with NaN (header lines are not counted)
    notes : list of sentences for the user (always one saying how each column was read)
    warnings : list of sentences: values that are implausible as read (a wrong unit, raw counts)
    """

    wavelength_nm: np.ndarray
    values: np.ndarray
    wavelength_unit: str
    value_unit: str
    dropped_rows: int
    notes: list = field(default_factory=list)
    warnings: list = field(default_factory=list)

    @property
    def reflectance(self) -> np.ndarray:
        """Values as a fraction. Raw counts (``value_unit`` "counts") come back unchanged: they are not a
        reflectance until :func:`reflectance_from_counts` divides them by a reference, and
        :func:`fit_thickness` refuses them."""
        return self.values / 100.0 if self.value_unit == "percent" else self.values

    @property
    def is_counts(self) -> bool:
        """True when the value column holds raw detector counts (they need a reference spectrum)."""
        return self.value_unit == "counts"


_NUMBER = re.compile(r"^[-+]?(\d+([.,]\d*)?|[.,]\d+)([eE][-+]?\d+)?$")


def _split(line: str):
    line = line.strip()
    if not line or line[0] in "#;%!/":
        return None
    if ";" in line or "\t" in line:
        parts = re.split(r"[;\t]+", line)
    elif line.count(",") >= 1 and " " not in line.strip() and line.count(",") >= 2 and "." not in line:
        parts = line.split(",")
    elif "," in line and "." in line:
        parts = line.split(",")
    elif "," in line and " " in line:
        parts = re.split(r"\s+", line)
    elif line.count(",") == 1 and "." not in line:
        parts = line.split(",")                                         # "400,0.1" read as two columns
    else:
        parts = re.split(r"[\s,]+", line)
    return [p.strip() for p in parts if p.strip()]


def _num(text: str) -> float:
    if not _NUMBER.match(text):
        if text.lower() in ("nan", "-nan", "na", "n/a"):
            return float("nan")
        raise ValueError(text)
    return float(text.replace(",", "."))


def text_lines(text: str, *, what: str, max_lines: int, budget_s: float, fix: str,
               max_line_chars: int = MAX_LINE_CHARS, progress=None):
    """The lines of ``text`` as ``str.splitlines`` splits them, read within bounds.

    Yields ``(line number from 1, line without its end)``. The text is split a block at a time, so a
    file of many lines or one giant line never goes through one long split.

    Parameters
    ----------
    what : str  how messages name the file, e.g. "spectrum file"
    max_lines : int  most lines read; the next one raises
    budget_s : float  seconds the reading may take (checked every 1024 lines)
    fix : str  the sentence saying how to make the file fit, ending too-many-lines and too-slow messages
    max_line_chars : int  longest line accepted (at most 65,000 characters)
    progress : callable(lines read) or None
        Called every :data:`PROGRESS_EVERY_LINES` lines; it may raise to stop the reading.

    Raises
    ------
    InputError
        More than ``max_lines`` lines, a line longer than ``max_line_chars``, or over ``budget_s``.
    """
    if not 0 < max_line_chars < _LINE_BLOCK_CHARS - 2:
        raise ValueError(f"max_line_chars must be from 1 to {_LINE_BLOCK_CHARS - 3}")
    deadline = time.monotonic() + budget_s
    too_many = f"The {what} has more than {max_lines:,} lines; this page reads at most {max_lines:,}. {fix}"
    if text.count("\n", 0, _COUNT_CHARS) > max_lines:
        raise InputError(too_many)             # every "\n" ends a line: no need to read them one by one
    too_long = (f"Line {{:,}} of the {what} is longer than {max_line_chars:,} characters; each line holds one "
                f"row (a wavelength and a value). Save the {what} as CSV or TXT with one row per line.")
    n, start, end = 0, 0, len(text)
    while start < end:
        block = text[start:start + _LINE_BLOCK_CHARS]
        parts = block.splitlines(keepends=True)
        if start + len(block) < end:
            parts.pop()                        # it may go on in the next block, or be a "\r" before its "\n"
            if not parts:
                raise InputError(too_long.format(n + 1))
        for part in parts:
            n += 1
            if n > max_lines:
                raise InputError(too_many)
            line = part.rstrip(_LINE_ENDS)
            if len(line) > max_line_chars:
                raise InputError(too_long.format(n))
            if not n % YIELD_EVERY_LINES:
                time.sleep(0)                  # let the event loop's thread have the interpreter lock
            if not n & 1023 and time.monotonic() > deadline:
                raise InputError(f"Reading the {what} took longer than {budget_s:g} s (stopped at line {n:,}). "
                                 f"{fix}")
            if progress is not None and not n % PROGRESS_EVERY_LINES:
                progress(n)
            yield n, line
            start += len(part)


@dataclass(frozen=True)
class SpectrumTable:
    """The numbers of a spectrum file as read, before any unit is applied (see :func:`read_spectrum_table`).

    Attributes
    ----------
    rows : (n, 2) array  the first two numbers of each data row, in file order (finite)
    dropped : int  data rows without two numbers or with NaN
    """

    rows: np.ndarray
    dropped: int


def read_spectrum_table(content, *, max_bytes: int = MAX_SPECTRUM_BYTES, progress=None) -> SpectrumTable:
    """Read the two number columns of a spectrometer export (the slow part of :func:`read_spectrum`).

    At most :data:`MAX_SPECTRUM_LINES` lines of at most :data:`MAX_LINE_CHARS` characters are read, within
    :data:`SPECTRUM_READ_BUDGET_S`; ``progress(lines read)`` is called every
    :data:`PROGRESS_EVERY_LINES` lines and may raise to stop. The table carries no unit:
    :func:`read_spectrum` applies them, quickly, as often as the choice changes.

    Raises
    ------
    InputError
        Not text, too large, too many or too long lines, too slow to read, text in the number columns
        of the data block, fewer than :data:`MIN_POINTS` rows.
    """
    if isinstance(content, (bytes, bytearray, memoryview)):
        content = bytes(content)
        if len(content) > max_bytes:
            raise InputError(f"The spectrum file is larger than {max_bytes / 1e6:g} MB; export just two columns.")
        try:
            text = content.decode("utf-8-sig")
        except UnicodeDecodeError:
            try:
                text = content.decode("latin-1")
            except UnicodeDecodeError:  # pragma: no cover - latin-1 decodes any byte
                raise InputError("The spectrum file is not text.") from None
        if "\x00" in text:
            raise InputError("The spectrum file is not text (it contains binary data); export it as CSV or TXT.")
    elif isinstance(content, str):
        if len(content) > max_bytes:
            raise InputError(f"The spectrum is longer than {max_bytes / 1e6:g} MB; export just two columns.")
        text = content
    else:
        raise InputError("A spectrum is the text of a CSV or TXT file.")
    rows, dropped, started, bad_line = [], 0, False, None
    lines = text_lines(text, what="spectrum file", max_lines=MAX_SPECTRUM_LINES, budget_s=SPECTRUM_READ_BUDGET_S,
                       fix="Export every 1 nm, or crop the band to the wavelengths you fit, and upload it again.",
                       progress=progress)
    for lineno, line in lines:
        parts = _split(line)
        if parts is None:
            continue
        try:
            nums = [_num(p) for p in parts[:2]]
        except ValueError:
            if started:
                bad_line = bad_line or (lineno, line.strip()[:60])
                dropped += 1
            continue                                                    # a header line before the data
        if len(nums) < 2:
            if started:
                dropped += 1
            continue
        started = True
        if not all(np.isfinite(nums)):
            dropped += 1
            continue
        rows.append(nums)
    if bad_line and len(rows) < 2 * dropped:
        raise InputError(f"Line {bad_line[0]} has text where numbers are expected ('{bad_line[1]}'); the data "
                         "block must be two numeric columns: wavelength, reflectance.")
    if len(rows) < MIN_POINTS:
        raise InputError(f"The file has {len(rows)} usable rows of two numbers; a fit needs at least {MIN_POINTS}. "
                         "Export wavelength and reflectance as two columns.")
    arr = np.array(rows, dtype=float)
    arr.flags.writeable = False
    return SpectrumTable(arr, dropped)


def read_spectrum(content, *, wavelength_unit: str | None = None, value_unit: str | None = None,
                  max_bytes: int = MAX_SPECTRUM_BYTES, progress=None) -> SpectrumData:
    """Read a spectrometer export: two numeric columns, wavelength and reflectance.

    Header lines are skipped; columns may be separated by commas, semicolons, tabs or spaces;
    decimals may be dots or commas (with ; or tab separators); wavelengths in nm or µm and values
    as fractions or percent are detected (give ``wavelength_unit`` "nm"/"um" or ``value_unit``
    "fraction"/"percent" to override); rows are sorted and repeated wavelengths averaged; rows
    with NaN or a single number are dropped and counted.

    ``content`` is the file's bytes or text, or a :class:`SpectrumTable` already read by
    :func:`read_spectrum_table` (then only the units are applied, which is quick). ``progress`` is passed
    to :func:`read_spectrum_table`.

    Raises
    ------
    InputError
        Not text, text in the number columns of the data block, fewer than :data:`MIN_POINTS` rows,
        or one of the bounds of :func:`read_spectrum_table`.
    """
    table = (content if isinstance(content, SpectrumTable) else
             read_spectrum_table(content, max_bytes=max_bytes, progress=progress))
    dropped = table.dropped
    wl, val = table.rows[:, 0], table.rows[:, 1]
    notes, warnings = [], []
    given_wl = wavelength_unit is not None
    if wavelength_unit is None:
        wavelength_unit = "um" if np.nanmax(wl) < 50 else "nm"
    if wavelength_unit not in ("nm", "um"):
        raise InputError(f"wavelength_unit is 'nm' or 'um'; got {wavelength_unit!r}.")
    wl_text = "µm" if wavelength_unit == "um" else "nm"
    if wavelength_unit == "um":
        wl = wl * 1000.0
    notes.append(f"Wavelengths read as {wl_text} ({'as chosen' if given_wl else 'detected'}; "
                 f"{wl.min():g}-{wl.max():g} nm)" + ("." if given_wl else "; override if wrong."))
    lo, hi = PLAUSIBLE_WAVELENGTH_NM
    if wl.min() < lo or wl.max() > hi:
        warnings.append(f"Read as {wl_text}, the wavelengths span {wl.min():g}-{wl.max():g} nm, outside the "
                        f"{lo:g}-{hi:g} nm a film reflectometer measures: check the wavelength unit.")
    given_value = value_unit is not None
    top = float(np.nanmax(val))
    if value_unit is None:
        value_unit = "counts" if top > COUNTS_ABOVE else "percent" if top > PERCENT_ABOVE else "fraction"
    if value_unit not in ("fraction", "percent", "counts"):
        raise InputError(f"value_unit is 'fraction', 'percent' or 'counts'; got {value_unit!r}.")
    how = "as chosen" if given_value else "detected"
    if value_unit == "counts":
        notes.append(f"Values read as raw counts ({how}; largest value {top:g}).")
        if not given_value:
            warnings.append(f"The values reach {top:g}, too large for a reflectance in percent: they look like "
                            "raw counts. Add a reference spectrum (and a dark one) to turn them into reflectance.")
    else:
        scale = 0.01 if value_unit == "percent" else 1.0
        as_text = "percent" if value_unit == "percent" else "a fraction"
        notes.append(f"Reflectance read as {as_text} ({how}; largest value {top:g}"
                     + (f" = {top * scale:.4g} as a fraction" if scale != 1.0 else "") + ")"
                     + ("." if given_value else "; override if wrong."))
        if top * scale > PLAUSIBLE_MAX_REFLECTANCE:
            warnings.append(f"Read as {as_text}, the reflectance reaches {top * scale:g}, above "
                            f"{PLAUSIBLE_MAX_REFLECTANCE:g}: " + ("these look like percent; choose percent."
                                                                  if top <= COUNTS_ABOVE else
                                                                  "these look like raw counts; add a reference "
                                                                  "spectrum (and a dark one)."))
        elif value_unit == "percent" and given_value and top <= PERCENT_ABOVE:
            notes.append(f"Every value is below {PERCENT_ABOVE:g} %: if the file holds fractions (0-1), choose "
                         "fraction.")
    if np.any(wl <= 0):
        raise InputError("Some wavelengths are zero or negative; check the wavelength column.")
    order = np.argsort(wl, kind="stable")
    wl, val = wl[order], val[order]
    uniq, inv, counts = np.unique(wl, return_inverse=True, return_counts=True)
    if uniq.size < wl.size:
        val = np.bincount(inv, weights=val) / counts
        notes.append(f"{wl.size - uniq.size} repeated wavelength(s) averaged.")
        wl = uniq
    if not (np.all(np.isfinite(wl)) and np.all(np.isfinite(val))):
        raise InputError("Some values are too large to be a spectrum (they overflow); check the columns.")
    if dropped:
        notes.append(f"{dropped} row(s) without two numbers were dropped.")
    if wl.size < MIN_POINTS:
        raise InputError(f"Only {wl.size} distinct wavelengths; a fit needs at least {MIN_POINTS}.")
    return SpectrumData(wl, val, wavelength_unit, value_unit, dropped, notes, warnings)


def reflectance_from_counts(sample, reference, dark=None, reference_reflectance=1.0) -> np.ndarray:
    """Reflectance from raw counts: (S − D)/(Ref − D) × R_ref, on one wavelength grid.

    ``reference_reflectance`` is a number or an array (e.g. bare silicon computed by
    ``Stack([], substrate="Si").reflectance``).
    """
    S = require_finite("sample counts", sample)
    Rf = require_finite("reference counts", reference)
    D = np.zeros_like(S) if dark is None else require_finite("dark counts", dark)
    if not (S.shape == Rf.shape == D.shape):
        raise InputError(f"Sample, reference and dark spectra must share one wavelength grid "
                         f"(got {S.shape}, {Rf.shape}, {D.shape}).")
    den = Rf - D
    if np.any(den <= 0):
        raise InputError("The reference is not above the dark spectrum everywhere; re-measure the reference.")
    return (S - D) / den * np.asarray(reference_reflectance, dtype=float)


# ---------------------------------------------------------------------- Fourier estimate
def optical_thickness_fft(wavelength_nm, reflectance, angle_deg=0.0, n_ambient=1.0, oversample=16):
    """Optical thickness n·d·cos θ_layer (nm) from the fringe frequency of R against 1/λ.

    R is resampled on a uniform wavenumber grid, detrended, windowed and Fourier transformed;
    the strongest non-zero frequency f (cycles per nm⁻¹) gives 2·n·d·cos θ = f. Returns the
    estimate of n·d·cos θ in nm (divide by the layer's n cos θ for d). Resolution: about
    1/(2 Δ(1/λ)) over the band, so thin layers with less than ~one fringe are not resolved.
    """
    wl = require_finite("wavelength_nm", wavelength_nm, minimum=0.0, min_inclusive=False, unit="nm").ravel()
    R = require_finite("reflectance", reflectance).ravel()
    if wl.size != R.size or wl.size < MIN_POINTS:
        raise InputError(f"Give at least {MIN_POINTS} matching wavelengths and reflectances.")
    k = 1.0 / wl
    order = np.argsort(k)
    k, R = k[order], R[order]
    n = int(oversample * wl.size)
    ku = np.linspace(k[0], k[-1], wl.size)
    Ru = np.interp(ku, k, R)
    Ru = Ru - np.polyval(np.polyfit(ku, Ru, 2), ku)
    Ru = Ru * np.hanning(Ru.size)
    spec = np.abs(np.fft.rfft(Ru, n))
    freq = np.fft.rfftfreq(n, d=ku[1] - ku[0])                          # cycles per (1/nm) = nm
    i = int(np.argmax(spec[1:]) + 1)
    if 0 < i < spec.size - 1:                                           # parabolic peak interpolation
        y0, y1, y2 = np.log(spec[i - 1:i + 2] + 1e-300)
        i = i + 0.5 * (y0 - y2) / (y0 - 2 * y1 + y2)
    f = float(np.interp(i, np.arange(freq.size), freq))
    return f / 2.0


def noise_rms(reflectance) -> float:
    """Measurement noise (rms, same unit as ``reflectance``) estimated from the spectrum itself.

    For white noise of rms σ the second difference R[i-1] - 2R[i] + R[i+1] has rms √6·σ; the median
    absolute deviation, scaled by :data:`MAD_TO_SIGMA`, makes the estimate robust to the few large
    second differences of fringes and spikes. Smooth fringes sampled by many points add little to it;
    fringes sampled by few points inflate it (an over-estimate, never an under-estimate of the noise).

    References
    ----------
    P. J. Rousseeuw and C. Croux, J. Am. Stat. Assoc. 88, 1273 (1993) (the MAD as a scale estimate).
    """
    R = np.asarray(reflectance, dtype=float).ravel()
    if R.size < 3:
        return 0.0
    d2 = R[:-2] - 2.0 * R[1:-1] + R[2:]
    return float(MAD_TO_SIGMA * np.median(np.abs(d2 - np.median(d2))) / np.sqrt(6.0))


def _n_cos(stack, medium, wl_nm, angle_deg) -> np.ndarray:
    """Real part of n·cos θ inside medium ``medium`` (0 = ambient, 1 = top layer) at ``wl_nm``."""
    opt = _Optics(stack, np.atleast_1d(np.asarray(wl_nm, dtype=float)), np.array([float(angle_deg)]))
    return np.abs(opt.kz[medium, 0, :].real)


def _bin_dense(stack, wl, R, angle, unknown):
    """Average a dense spectrum in equal groups of neighbouring points (see :data:`MAX_FIT_POINTS`).

    ``unknown`` maps layer index -> the top of its window (nm). Returns (wl, R, points per group).
    """
    n = wl.size
    if n <= MAX_FIT_POINTS:
        return wl, R, 1
    nc = _n_cos(stack, slice(1, len(stack.layers) + 1), [wl.min()], angle)[:, 0] if stack.layers else np.zeros(0)
    thick = np.array([unknown.get(i, l.thickness_nm) for i, l in enumerate(stack.layers)])
    opd = float(np.sum(nc * thick))                                    # n·d·cos θ summed, nm
    k = 1.0 / wl
    dk = np.percentile(np.abs(np.diff(k)), 99)                         # the sparsest spacing in 1/λ
    fringe_dk = 1.0 / (2.0 * max(opd, 1e-9))                           # fringe period in 1/λ (Born & Wolf 7.5.1)
    m = int(min(fringe_dk / (BIN_POINTS_PER_FRINGE * max(dk, 1e-300)), n // MIN_BINNED_POINTS))
    if m < 2:
        return wl, R, 1
    starts = np.arange(0, n, m)
    counts = np.diff(np.r_[starts, n])
    return np.add.reduceat(wl, starts) / counts, np.add.reduceat(R, starts) / counts, m


def _judge(rms, noise, spread, fourier_d, fringes, window, layer_name):
    """(quality, quality_note, window_hint) of a fit; see :data:`MISFIT_NOISE_RATIO`."""
    misfit = rms > RMS_TOLERANCE and rms > MISFIT_NOISE_RATIO * noise
    poor = misfit and rms > POOR_FIT_SPREAD_RATIO * spread
    hint = ""
    if misfit and fourier_d is not None and fringes >= FOURIER_MIN_FRINGES:
        lo, hi = window
        if fourier_d > hi:
            top = float(np.ceil(FOURIER_WINDOW_MARGIN * fourier_d / 100.0) * 100.0)
            hint = (f"The Fourier estimate d ≈ {fourier_d:.0f} nm lies above the window searched ({lo:g}-{hi:g} nm): "
                    f"widen the window to about {top:g} nm and fit again.")
        elif fourier_d < lo:
            bottom = float(np.floor(fourier_d / FOURIER_WINDOW_MARGIN / 100.0) * 100.0)
            hint = (f"The Fourier estimate d ≈ {fourier_d:.0f} nm lies below the window searched ({lo:g}-{hi:g} nm): "
                    f"start the window at about {max(bottom, 0.0):g} nm and fit again.")
    if poor:
        note = (f"The model does not reproduce the measured fringes (rms {100 * rms:.2g} % against a spread of "
                f"{100 * spread:.2g} % in the spectrum): the thickness is not trustworthy. Check the stack "
                f"(materials and fixed thicknesses), the units and the thickness window of {layer_name}.")
    elif misfit:
        note = (f"The residual (rms {100 * rms:.2g} %) is {rms / max(noise, 1e-300):.0f} times the noise seen in the "
                "spectrum: the model misses a systematic part of it, and the ± covers the noise only. Check the "
                "stack and the reference; free scale or offset may help.") if noise > 0 else (
                f"The residual (rms {100 * rms:.2g} %) is larger than the noise seen in the spectrum: the model misses "
                "a systematic part of it, and the ± covers the noise only.")
    else:
        note = ""
    return ("poor" if poor else "misfit" if misfit else "good"), note, hint


def fit_thickness_reporting(reporter, **kwargs) -> FitResult:
    """:func:`fit_thickness` (``**kwargs``) telling ``reporter.report(fraction, text)`` how far it has come
    (a worker process's progress channel, whose ``report`` raises to stop the fit)."""
    return fit_thickness(**kwargs, progress=reporter.report)


# ---------------------------------------------------------------------- fit
@dataclass(frozen=True)
class FitResult:
    """Result of :func:`fit_thickness`.

    Attributes
    ----------
    thickness_nm, uncertainty_nm : the unknown layer (1 σ from the curvature scaled by the residual)
    second_thickness_nm, second_uncertainty_nm : the second unknown layer, or None
    rms : root-mean-square residual of reflectance (fraction)
    scale, offset : fitted (1 and 0 when not free)
    wavelength_nm, measured, model, residual : (n,) the points used
    scan_thickness_nm, scan_rms : the goodness-of-fit curve along the unknown thickness (for two
        layers: along the first, minimised over the second)
    minima : list of (thickness_nm, rms) of the refined local minima, best first
    warning : a sentence when another minimum competes, else ""
    n_points, n_parameters : int
    quality : "good" (residual at the noise level), "misfit" (a systematic residual: the uncertainty
        covers noise only) or "poor" (the model does not reproduce the fringes: the thickness is not
        trustworthy); see :data:`MISFIT_NOISE_RATIO`, :data:`POOR_FIT_SPREAD_RATIO`
    quality_note : a sentence for "misfit" and "poor", else ""
    noise_rms : measurement noise estimated from the spectrum itself (fraction, on the points fitted)
    spread : standard deviation of the measured reflectance (fraction)
    fourier_optical_nm, fourier_thickness_nm : the Fourier estimate of n·d·cos θ and of d for the unknown
        layer (None when the band holds too few fringes); fourier_fringes: fringes it sees in the band
    window_hint : a sentence when the Fourier estimate lies outside the window and the fit is not good
    uncertainty_floor_nm : :data:`UNCERTAINTY_FLOOR_NM`; ``quoted_uncertainty_nm`` is never below it
    n_points_read, points_per_bin : the spectrum's points in the range used, and how many were averaged
        into each fitted point (1: none)
    """

    thickness_nm: float
    uncertainty_nm: float
    rms: float
    scale: float
    offset: float
    wavelength_nm: np.ndarray
    measured: np.ndarray
    model: np.ndarray
    residual: np.ndarray
    scan_thickness_nm: np.ndarray
    scan_rms: np.ndarray
    minima: list
    warning: str
    n_points: int
    n_parameters: int
    second_thickness_nm: float | None = None
    second_uncertainty_nm: float | None = None
    quality: str = "good"
    quality_note: str = ""
    noise_rms: float = 0.0
    spread: float = 0.0
    fourier_optical_nm: float | None = None
    fourier_thickness_nm: float | None = None
    fourier_fringes: float = 0.0
    window_hint: str = ""
    uncertainty_floor_nm: float = UNCERTAINTY_FLOOR_NM
    n_points_read: int = 0
    points_per_bin: int = 1

    @property
    def quoted_uncertainty_nm(self) -> float:
        """The 1σ to quote: the statistical one, floored at :attr:`uncertainty_floor_nm`."""
        return max(self.uncertainty_nm, self.uncertainty_floor_nm)

    @property
    def second_quoted_uncertainty_nm(self) -> float | None:
        if self.second_uncertainty_nm is None:
            return None
        return max(self.second_uncertainty_nm, self.uncertainty_floor_nm)

    @property
    def trustworthy(self) -> bool:
        """False when the model does not reproduce the measured fringes (``quality`` "poor")."""
        return self.quality != "poor"


def _prepare(wavelength_nm, reflectance, stack, wavelength_range_nm):
    wl = require_finite("wavelength_nm", wavelength_nm, minimum=0.0, min_inclusive=False, unit="nm").ravel()
    R = require_finite("reflectance", reflectance).ravel()
    if wl.size != R.size:
        raise InputError(f"wavelength_nm has {wl.size} values and reflectance {R.size}; they must match.")
    if R.size and R.max() > MAX_FRACTION:
        raise InputError(f"Reflectance reaches {R.max():g} as a fraction, above {MAX_FRACTION:g}: give it as a "
                         "fraction (0-1): percent divided by 100, raw counts divided by a reference spectrum.")
    order = np.argsort(wl)
    wl, R = wl[order], R[order]
    if wavelength_range_nm is not None:
        lo, hi = require_finite("wavelength_range_nm", wavelength_range_nm, minimum=0.0, unit="nm").ravel()[:2]
        keep = (wl >= lo) & (wl <= hi)
        wl, R = wl[keep], R[keep]
    if wl.size < MIN_POINTS:
        raise InputError(f"{wl.size} points in the range used; a fit needs at least {MIN_POINTS}.")
    lo, hi = stack.wavelength_range_nm()
    if wl[0] < lo * (1 - 1e-9) or wl[-1] > hi * (1 + 1e-9):
        raise WavelengthRangeError(f"The spectrum spans {wl[0]:g}-{wl[-1]:g} nm but the stack's materials have data "
                                   f"only from {lo:g} to {hi:g} nm; restrict the wavelength range to that band.")
    return wl, R


def _window(thickness_nm, name):
    w = require_finite(name, thickness_nm, minimum=0.0, unit="nm").ravel()
    if w.size != 2 or not w[0] < w[1]:
        raise InputError(f"{name} is a window (lowest, highest) in nm with lowest < highest; got {thickness_nm!r}.")
    return float(w[0]), float(w[1])


def _scan_grid(stack, layer, window, wl, angle_deg, name):
    """A thickness grid fine enough to sample every fringe of the shortest wavelength."""
    nkz = float(_n_cos(stack, layer + 1, wl.min(), angle_deg)[0])
    period = wl.min() / (2.0 * max(nkz, 1e-6))                         # thickness per fringe
    n = int(np.ceil((window[1] - window[0]) / period * SAMPLES_PER_FRINGE)) + 1
    if n > MAX_SCAN_POINTS:
        raise InputError(f"The {name} {window[0]:g}-{window[1]:g} nm spans {n / SAMPLES_PER_FRINGE:.0f} fringes at "
                         f"{wl.min():g} nm, more than the fit resolves ({MAX_SCAN_POINTS // SAMPLES_PER_FRINGE}); "
                         "narrow the window or use longer wavelengths.")
    return np.linspace(window[0], window[1], max(n, 21))


def _linear_fit(model, R, scale, offset):
    """Closed-form best scale s and offset o for s·model + o ≈ R along the last axis; returns (s, o, ssr)."""
    if not scale and not offset:
        return np.ones(model.shape[:-1]), np.zeros(model.shape[:-1]), np.sum((model - R) ** 2, axis=-1)
    if scale and not offset:
        s = np.sum(model * R, axis=-1) / np.maximum(np.sum(model * model, axis=-1), 1e-300)
        return s, np.zeros_like(s), np.sum((s[..., None] * model - R) ** 2, axis=-1)
    if offset and not scale:
        o = np.mean(R - model, axis=-1)
        return np.ones_like(o), o, np.sum((model + o[..., None] - R) ** 2, axis=-1)
    n = model.shape[-1]
    sx, sy = model.sum(-1), R.sum(-1)
    sxx, sxy = (model * model).sum(-1), (model * R).sum(-1)
    det = n * sxx - sx * sx
    s = np.where(np.abs(det) > 1e-300, (n * sxy - sx * sy) / np.where(det == 0, 1, det), 1.0)
    o = (sy - s * sx) / n
    return s, o, np.sum((s[..., None] * model + o[..., None] - R) ** 2, axis=-1)


def _refine(residual, p0, lower, upper, max_nfev):
    try:
        return least_squares(residual, p0, bounds=(lower, upper), x_scale="jac", method="trf",
                             xtol=XTOL, ftol=FTOL, max_nfev=max_nfev)
    except ValueError as exc:  # pragma: no cover - defensive: bounds and starts are checked above
        raise InputError(f"The fit could not start: {exc}") from None


def _ranked_starts(stack, layer, grid, ssr, window, angle, wl, R, polarization, free_scale, free_offset):
    """Starts for the refinement: the scan's local minima, each re-sampled finely over the step on either
    side and ranked by its best fine value (the coarse samples are ranked mostly by where the grid
    happens to fall relative to each minimum)."""
    idx = _local_minima(ssr)[:FINE_CANDIDATES]
    step = grid[1] - grid[0]
    fine = np.stack([np.linspace(max(grid[i] - step, window[0]), min(grid[i] + step, window[1]), FINE_POINTS)
                     for i in idx])                                               # (C, F)
    model = sweep(stack, layer, fine.ravel(), [angle], wl, polarization)[:, 0, :]
    ssr_f = _linear_fit(model, R, free_scale, free_offset)[2].reshape(fine.shape)
    j = np.argmin(ssr_f, axis=1)
    best = ssr_f[np.arange(len(idx)), j]
    order = np.argsort(best, kind="stable")[:STARTS_REFINED]
    return [float(fine[k, j[k]]) for k in order]


def _local_minima(y):
    left = np.r_[np.inf, y[:-1]]
    right = np.r_[y[1:], np.inf]
    idx = np.flatnonzero((y <= left) & (y <= right))
    return idx[np.argsort(y[idx])]


def fit_thickness(wavelength_nm, reflectance, stack: Stack, layer: int = 0, thickness_nm=(0, 3000),
                  angle_deg: float = 0.0, *, second_layer: int | None = None, second_thickness_nm=(0, 3000),
                  polarization: str = "unpolarized", free_scale: bool = False, free_offset: bool = False,
                  wavelength_range_nm=None, max_grid_points: int | None = None, progress=None) -> FitResult:
    """Fit the thickness of one (or two) layers of ``stack`` to a measured reflectance spectrum.

    Parameters
    ----------
    wavelength_nm, reflectance : (n,) arrays; reflectance as a fraction (see :func:`read_spectrum`)
    stack : Stack  the model; the unknown layers' thicknesses in it are ignored
    layer : int  index of the unknown layer (0 = top)
    thickness_nm : (lo, hi)  window searched for it, nm
    angle_deg : float  angle of incidence, degrees
    second_layer : int, optional  a second unknown layer, with its window ``second_thickness_nm``
    polarization : {"s", "p", "unpolarized"}
    free_scale, free_offset : fit R_measured ≈ scale·R_model + offset (an imperfect reference, stray light)
    wavelength_range_nm : (lo, hi), optional  the part of the spectrum used
    max_grid_points : int, optional  refuse (InputError) a scan whose model array, scan thicknesses x
        wavelengths, would hold more points than this (a server's memory guard)
    progress : callable(fraction, text), optional  told how far the fit has come; it may raise to stop it

    Spectra denser than :data:`MAX_FIT_POINTS` are averaged in equal groups of neighbouring points first
    (``points_per_bin`` says how many). The result judges its own quality (``quality``, ``quality_note``)
    and compares the window with the Fourier estimate (``window_hint``).

    Returns
    -------
    FitResult
    """
    say = progress or (lambda fraction, text: None)
    if not isinstance(stack, Stack):
        raise InputError(f"fit_thickness needs a Stack; got {type(stack).__name__}.")
    _check_layer_index(stack, layer)
    angle = float(require_finite("angle_deg", angle_deg, minimum=0.0, maximum=89.9, unit="deg"))
    wl, R = _prepare(wavelength_nm, reflectance, stack, wavelength_range_nm)
    w1 = _window(thickness_nm, "thickness window")
    two = second_layer is not None
    if two:
        _check_layer_index(stack, second_layer)
        if second_layer == layer:
            raise InputError("The second unknown layer must differ from the first.")
        w2 = _window(second_thickness_nm, "second thickness window")
    n_read = wl.size
    wl, R, per_bin = _bin_dense(stack, wl, R, angle, {layer: w1[1], **({second_layer: w2[1]} if two else {})})
    grid1 = _scan_grid(stack, layer, w1, wl, angle, "thickness window")
    if max_grid_points is not None and grid1.size * wl.size > max_grid_points:
        raise InputError(f"The fit's scan needs {grid1.size:,} thicknesses x {wl.size:,} wavelengths = "
                         f"{grid1.size * wl.size:,} grid points; this server allows {int(max_grid_points):,}. "
                         "Narrow the thickness window or the wavelength range used.")
    say(0.0, "scanning the thickness window")
    if not two:
        model = sweep(stack, layer, grid1, [angle], wl, polarization)[:, 0, :]        # (T, W)
        s, o, ssr = _linear_fit(model, R, free_scale, free_offset)
        starts = [(t,) for t in _ranked_starts(stack, layer, grid1, ssr, w1, angle, wl, R, polarization,
                                               free_scale, free_offset)]
        scan_rms = np.sqrt(ssr / wl.size)
    else:
        grid2 = _scan_grid(stack, second_layer, w2, wl, angle, "second thickness window")
        ssr2 = np.empty((grid1.size, grid2.size))
        for j, t2 in enumerate(grid2):
            if j % 16 == 0:
                say(0.8 * j / grid2.size, f"scanning both windows ({j} of {grid2.size} steps)")
            st2 = stack.with_thickness(second_layer, t2)
            model = sweep(st2, layer, grid1, [angle], wl, polarization)[:, 0, :]
            ssr2[:, j] = _linear_fit(model, R, free_scale, free_offset)[2]
        flat = ssr2.ravel()
        # local minima of the 2-D surface: not above any of the 8 neighbours
        pad = np.pad(ssr2, 1, constant_values=np.inf)
        neigh = np.stack([pad[1 + di:1 + di + ssr2.shape[0], 1 + dj:1 + dj + ssr2.shape[1]]
                          for di in (-1, 0, 1) for dj in (-1, 0, 1) if (di, dj) != (0, 0)])
        is_min = np.all(ssr2 <= neigh, axis=0)
        cand = np.flatnonzero(is_min.ravel())
        cand = cand[np.argsort(flat[cand])][:STARTS_REFINED]
        starts = [(grid1[c // grid2.size], grid2[c % grid2.size]) for c in cand]
        scan_rms = np.sqrt(ssr2.min(axis=1) / wl.size)
    n_lin = int(free_scale) + int(free_offset)

    def unpack(p):
        t1 = p[0]
        t2 = p[1] if two else None
        i = 2 if two else 1
        sc = p[i] if free_scale else 1.0
        of = p[i + int(free_scale)] if free_offset else 0.0
        return t1, t2, sc, of

    def model_at(p):
        t1, t2, sc, of = unpack(p)
        st = stack.with_thickness(layer, t1)
        if two:
            st = st.with_thickness(second_layer, t2)
        return sc * st.reflectance(wl, angle, polarization) + of

    lower = [w1[0]] + ([w2[0]] if two else []) + [-np.inf] * n_lin
    upper = [w1[1]] + ([w2[1]] if two else []) + [np.inf] * n_lin
    refined = []
    say(0.8 if two else 0.4, "refining the best minima")
    for start in starts:
        base = model_at(list(start) + [1.0] * int(free_scale) + [0.0] * int(free_offset))
        model0 = base if not (free_scale or free_offset) else base
        s0, o0, _ = _linear_fit(model0[None, :], R, free_scale, free_offset)
        p0 = list(start) + ([float(s0[0])] if free_scale else []) + ([float(o0[0])] if free_offset else [])
        p0 = [min(max(v, lo_), hi_) for v, lo_, hi_ in zip(p0, lower, upper)]
        refined.append(_refine(lambda p: model_at(p) - R, p0, lower, upper, FIRST_NFEV))
    # Large-residual minima converge slowly and can never compete: finish only those that might.
    best_cost = min(s.cost for s in refined)
    refined = [_refine(lambda p: model_at(p) - R, s.x, lower, upper, 200)
               if s.status == 0 and s.cost <= FINISH_COST_RATIO * best_cost else s for s in refined]
    refined.sort(key=lambda s: s.cost)
    best = refined[0]
    p = best.x
    n, k = wl.size, p.size
    resid = best.fun
    ssr = float(np.sum(resid ** 2))
    dof = max(n - k, 1)
    J = best.jac
    try:
        cov = np.linalg.pinv(J.T @ J) * (ssr / dof)
        sig = np.sqrt(np.clip(np.diag(cov), 0.0, None))
    except np.linalg.LinAlgError:  # pragma: no cover
        sig = np.full(k, np.nan)
    t1, t2, sc, of = unpack(p)
    rms = float(np.sqrt(ssr / n))
    minima = []
    for sol in refined:
        x = sol.x
        if all(abs(x[0] - m[0]) > max(1e-3, 3 * sig[0]) for m in minima):
            minima.append((float(x[0]), float(np.sqrt(2 * sol.cost / n))))
    warning = ""
    rivals = [m for m in minima[1:] if m[1] <= COMPETING_RMS_RATIO * max(rms, 1e-12)]
    if rivals:
        warning = (f"Another minimum at {rivals[0][0]:.1f} nm fits almost as well (rms {rivals[0][1]:.2e} vs "
                   f"{rms:.2e}): the order is not settled by this spectrum. Extend the wavelength range, add a "
                   "second angle, or narrow the window with other knowledge.")
    if t1 - w1[0] < sig[0] or w1[1] - t1 < sig[0]:
        warning = (warning + " " if warning else "") + ("The fitted thickness is at the edge of its window; the "
                                                         "true value may lie outside it. Widen the window.")
    model = model_at(p)
    noise, spread = noise_rms(R), float(np.std(R))
    fringes, f_opt, f_d = 0.0, None, None
    try:
        f_opt = optical_thickness_fft(wl, R, angle)
        fringes = 2.0 * f_opt * (1.0 / wl[0] - 1.0 / wl[-1])
        if fringes >= FOURIER_MIN_FRINGES:
            f_d = f_opt / float(_n_cos(stack, layer + 1, [0.5 * (wl[0] + wl[-1])], angle)[0])
    except InputError:  # pragma: no cover - the points were checked above
        pass
    quality, note, hint = _judge(rms, noise, spread, f_d, fringes, w1, f"layer {layer + 1}")
    return FitResult(float(t1), float(sig[0]), rms, float(sc), float(of), wl, R, model, R - model, grid1, scan_rms,
                     minima, warning, n, k, float(t2) if two else None, float(sig[1]) if two else None,
                     quality=quality, quality_note=note, noise_rms=noise, spread=spread, fourier_optical_nm=f_opt,
                     fourier_thickness_nm=f_d, fourier_fringes=float(fringes), window_hint=hint,
                     n_points_read=int(n_read), points_per_bin=int(per_bin))

"""Command line and Python entry for batch thickness maps of a folder of photos.

Usage::

    python -m batch PHOTOS_DIR --stack STACK.json|PRESET_NAME (--box x0 y0 x1 y1 | --calibration NAME)
        [--library FOLDER] [--calibration-version N] [--layer 0] [--window 0 1000] [--reference substrate|0.18] [--illuminant D65]
        [--angle 0] [--nominal NM] [--max-delta-e 6] [--out OUT_DIR]
        [--scheduler tcp://host:port] [--workers N] [--pattern "*.jpg,*.png,..."] [--quiet]

Every photo in ``PHOTOS_DIR`` (not its subfolders) whose name matches one of the
patterns (case-insensitive), in sorted order, becomes one Dask task. The task
loads the photo from its path, computes :func:`physics.thickness_map`, writes
``<stem>_thickness.npy`` (float32, NaN where no colour matched) and
``<stem>_thickness.png`` (the map with a colour bar) to the output folder, and
returns one summary row, so no image travels between processes. ``summary.csv``
in the output folder lists every photo.

``--calibration NAME`` reads a camera calibration (and its flat field) saved in the lab library
(``camera_calibrations``, see ``views/camera_calibration.py``) from the folder the page uses:
``--library``, else ``FRINGEGAUGE_LIBRARY``, else ``./lab-library``. Its metadata must be signed
with the library key (``FRINGEGAUGE_LIBRARY_KEY_FILE`` or its default), as for the page. The maps
then use it instead of the box's gains. The summary's ``uncertainty_median_nm`` and
``uncertainty_p95_nm`` columns give the median and 95th percentile of each map's per-pixel
thickness uncertainty (from the colour residual and the colour path's slope; with a calibration its
own ΔE00, with the box's gains one just-noticeable difference), ``calibration`` its name and version.

A photo that cannot be used (unreadable file, box outside the image, clipped or
dark box, ...) gets status ``error`` and its message in the summary; the others
carry on. Exit status: 0 every photo succeeded, 1 some failed, 2 bad arguments,
an unreadable stack, an unreachable scheduler or no photo found.

Work runs on a fresh local cluster of worker processes bound to 127.0.0.1
(``--workers``, one thread each), or on an existing ``dask.distributed``
cluster given by ``--scheduler``; its workers must be able to import ``batch``
and ``physics`` and to read the photo folder and write the output folder. At
most one photo per worker is in flight at a time, which bounds worker memory.

Heavy imports (numpy, physics, dask) happen inside the functions so that
``--help`` and argument errors answer at once.
"""

from __future__ import annotations

import argparse
import csv
import fnmatch
import functools
import io
import math
import os
import sys
import time
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path

__all__ = ["run_batch", "process_photo", "main", "build_parser", "DEFAULT_PATTERNS", "SUMMARY_FIELDS",
           "OUT_SUBDIR", "NOT_METROLOGY"]

#: File-name patterns matched by default (case-insensitive): JPEG, PNG, TIFF and the camera RAW/DNG endings of
#: physics.imageio.RAW_EXTENSIONS (written out, so that importing this module stays light; a test keeps them equal).
DEFAULT_PATTERNS = ("*.jpg", "*.jpeg", "*.png", "*.tif", "*.tiff",
                    "*.dng", "*.nef", "*.nrw", "*.cr2", "*.cr3", "*.crw", "*.arw", "*.srf", "*.sr2", "*.raf", "*.orf",
                    "*.rw2", "*.rwl", "*.pef", "*.srw", "*.3fr", "*.iiq", "*.erf", "*.kdc", "*.dcr", "*.mrw", "*.x3f")
#: Columns of summary.csv, in order; also the keys of each row returned by :func:`run_batch`.
SUMMARY_FIELDS = ("file", "status", "message", "mean_nm", "std_nm", "min_nm", "max_nm", "uniformity",
                  "valid_fraction", "gains_r", "gains_g", "gains_b", "seconds",
                  # robust statistics, after the first columns so that readers by position keep working
                  "median_nm", "p_low_nm", "p_high_nm", "uniformity_robust", "order_outlier_fraction",
                  # per-pixel thickness uncertainty, and the camera calibration used (--calibration)
                  "uncertainty_median_nm", "uncertainty_p95_nm", "calibration")
#: Default output folder, inside the photo folder.
OUT_SUBDIR = "thickness_maps"
#: Said on every summary and figure.
NOT_METROLOGY = "computed from colour; not certified metrology"
#: Seconds allowed to reach a scheduler given by address.
CONNECT_TIMEOUT_S = 15
_PROG = "python -m batch"
_STAT_KEYS = ("mean_nm", "std_nm", "min_nm", "max_nm", "uniformity", "valid_fraction", "median_nm", "p_low_nm",
              "p_high_nm", "uniformity_robust", "order_outlier_fraction")
#: Decimal places of each numeric column in summary.csv.
_CSV_DECIMALS = {"mean_nm": 2, "std_nm": 2, "min_nm": 2, "max_nm": 2, "uniformity": 4, "valid_fraction": 4,
                 "gains_r": 5, "gains_g": 5, "gains_b": 5, "seconds": 2, "median_nm": 2, "p_low_nm": 2,
                 "p_high_nm": 2, "uniformity_robust": 4, "order_outlier_fraction": 4, "uncertainty_median_nm": 2,
                 "uncertainty_p95_nm": 2}
#: The library kind ``--calibration`` names (library.store.KINDS).
CALIBRATION_KIND = "camera_calibrations"
#: Environment variable naming the lab library folder (as serve.py sets it for the page).
LIBRARY_ENV = "FRINGEGAUGE_LIBRARY"


# ---------------------------------------------------------------------- settings shipped to workers
@dataclass(frozen=True)
class PhotoSettings:
    """Everything a worker needs besides the photo's path; plain data, cheap to send.

    Attributes
    ----------
    stack_text : str
        The stack as stack-file JSON (stacks themselves do not pickle; text always does).
    stack_name : str
        Display name of the stack, for figure titles.
    layer_name : str
        Material of the measured layer, for figure titles.
    layer : int
        Index of the measured layer, 0 = top.
    window : (float, float)
        Thickness window searched, nm.
    box : (int, int, int, int) or None
        Calibration box (x0, y0, x1, y1), pixels, ends exclusive; None = no calibration.
    reference : "substrate" or float
        What the box shows: bare substrate or a grey card of this reflectance.
    illuminant : str
    angle_deg : float
    nominal_nm : float or None
    max_delta_e : float
    calibration_text : str or None
        A lab-library camera calibration's text (with its flat field); None = the box's gains.
    calibration_name : str
        Its name and version, for the summary.
    """

    stack_text: str
    stack_name: str
    layer_name: str
    layer: int
    window: tuple
    box: tuple | None
    reference: object
    illuminant: str
    angle_deg: float
    nominal_nm: float | None
    max_delta_e: float
    calibration_text: str | None = None
    calibration_name: str = ""


@functools.lru_cache(maxsize=4)
def _calibration_from_text(text: str):
    """(CameraCalibration, FlatField or None) of a library camera calibration's text, parsed once per worker."""
    from physics import camera
    from physics.stackfile import read_json_document

    data = read_json_document(text, "camera calibration", 10**7)
    flat = data.get("flat_field")
    return camera.CameraCalibration.from_dict(data["calibration"]), (
        None if flat is None else camera.FlatField.from_dict(flat))


@functools.lru_cache(maxsize=4)
def _stack_from_text(text: str):
    """The Stack of a stack-file text, parsed once per worker process."""
    from physics.stackfile import load_stack_file

    return load_stack_file(text).stack


def _empty_row(file: str) -> dict:
    return {key: (file if key == "file" else "" if key in ("status", "message", "calibration") else math.nan)
            for key in SUMMARY_FIELDS}


def _error_row(file: str, message: str, seconds: float = math.nan) -> dict:
    row = _empty_row(file)
    row.update(status="error", message=message, seconds=seconds)
    return row


def _save_atomic(path: Path, write) -> None:
    """Write a file through a temporary name, so a reader never sees half a file."""
    tmp = path.with_name(path.name + ".part")
    try:
        with open(tmp, "wb") as fh:
            write(fh)
        os.replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()


def process_photo(photo_path: str, out_stem: str, out_dir: str, settings: PhotoSettings) -> dict:
    """Thickness map of one photo, written to disk; the task each worker runs.

    Parameters
    ----------
    photo_path : str
        The photo file.
    out_stem : str
        Output names are ``<out_stem>_thickness.npy`` and ``<out_stem>_thickness.png``.
    out_dir : str
        Existing folder the outputs are written to.
    settings : PhotoSettings

    Returns
    -------
    dict
        One summary row, keys :data:`SUMMARY_FIELDS`: status ``"ok"`` with the map's
        statistics and calibration gains, or ``"error"`` with the reason in ``message``;
        ``seconds`` is the time spent on this photo (read, compute, write), without the
        worker's one-off imports. Never raises for a bad photo.
    """
    name = Path(photo_path).name
    try:
        import numpy as np

        from physics.errors import InputError
        from physics.inverse import thickness_map
        from views.render import colorbar_png
    except Exception as exc:                     # a worker without the package installed
        return _error_row(name, f"the worker cannot import fringegauge: {exc}")
    try:
        stack = _stack_from_text(settings.stack_text)   # once per worker: not counted in "seconds"
    except Exception as exc:
        return _error_row(name, f"the worker cannot read the stack: {exc}")
    try:
        camera = {}
        if settings.calibration_text is not None:
            cal, flat = _calibration_from_text(settings.calibration_text)
            camera = {"calibration": cal, "flat_field": flat}
    except Exception as exc:
        return _error_row(name, f"the worker cannot read the camera calibration: {exc}")
    started = time.perf_counter()
    try:
        tm = thickness_map(photo_path, stack, settings.layer, settings.window, settings.box, settings.illuminant,
                           angle_deg=settings.angle_deg, reference=settings.reference,
                           nominal_nm=settings.nominal_nm, max_delta_e=settings.max_delta_e, **camera)
        values = np.asarray(tm.thickness_nm, dtype=np.float32)
        png = colorbar_png(values, label="thickness (nm)", title=_figure_title(name, settings),
                           footer=_figure_footer(tm.message, settings), origin="upper",
                           **({} if np.isfinite(values).any() else {"vmin": settings.window[0],
                                                                   "vmax": settings.window[1]}))
        out = Path(out_dir)
        _save_atomic(out / f"{out_stem}_thickness.npy", lambda fh: np.save(fh, values, allow_pickle=False))
        _save_atomic(out / f"{out_stem}_thickness.png", lambda fh: fh.write(png))
    except InputError as exc:
        return _error_row(name, str(exc), time.perf_counter() - started)
    except OSError as exc:
        return _error_row(name, f"could not write the outputs: {exc}", time.perf_counter() - started)
    except Exception as exc:                     # keep the batch going; say it is not the photo's fault
        return _error_row(name, f"unexpected error ({type(exc).__name__}: {exc}); please report it",
                          time.perf_counter() - started)
    row = _empty_row(name)
    row.update(status="ok", message=tm.message, **{k: float(tm.stats[k]) for k in _STAT_KEYS})
    row.update(gains_r=float(tm.gains[0]), gains_g=float(tm.gains[1]), gains_b=float(tm.gains[2]))
    row.update(uncertainty_median_nm=float(tm.stats.get("median_uncertainty_nm", math.nan)),
               uncertainty_p95_nm=float(tm.stats.get("p95_uncertainty_nm", math.nan)))
    row["calibration"] = settings.calibration_name
    row["seconds"] = time.perf_counter() - started
    return row


def _figure_title(name: str, s: PhotoSettings) -> str:
    return f"{name}: {s.layer_name} thickness (layer {s.layer} of {s.stack_name})"


def _figure_footer(message: str, s: PhotoSettings) -> str:
    box = "no calibration box" if s.box is None else (
        f"box {' '.join(str(v) for v in s.box)} = {_reference_text(s.reference)}")
    if s.calibration_text is not None:
        box = f"camera calibration {s.calibration_name}"
    return (f"{message} Window {s.window[0]:g}-{s.window[1]:g} nm, {s.illuminant}, {s.angle_deg:g}°, {box}, "
            f"max ΔE00 {s.max_delta_e:g}. Grey = no match. Thickness {NOT_METROLOGY}.")


def _reference_text(reference) -> str:
    return "bare substrate" if reference == "substrate" else f"grey card {float(reference):g}"


# ---------------------------------------------------------------------- checks on the client
def _input_error(message: str):
    from physics.errors import InputError

    return InputError(message)


def _parse_patterns(patterns) -> tuple[str, ...]:
    if isinstance(patterns, str):
        patterns = patterns.split(",")
    try:
        out = tuple(p.strip() for p in patterns if isinstance(p, str) and p.strip())
    except TypeError:
        out = ()
    if not out:
        raise _input_error(f"patterns must list file-name patterns such as '*.jpg,*.png'; got {patterns!r}.")
    return out


def find_photos(photos_dir: Path, patterns) -> list[Path]:
    """Files directly in ``photos_dir`` whose name matches a pattern (case-insensitive), sorted by name.

    Parameters
    ----------
    photos_dir : Path
    patterns : str (comma-separated) or sequence of str

    Returns
    -------
    list of Path
    """
    pats = [p.lower() for p in _parse_patterns(patterns)]
    found = [p for p in photos_dir.iterdir()
             if p.is_file() and not p.name.startswith(".") and any(fnmatch.fnmatchcase(p.name.lower(), q) for q in pats)]
    return sorted(found, key=lambda p: (p.name.lower(), p.name))


def _output_stems(photos: list[Path]) -> list[str]:
    """``<stem>`` per photo, or ``<stem>_<ext>`` where two photos share a stem (a.jpg and a.png)."""
    counts: dict[str, int] = {}
    for p in photos:
        counts[p.stem.lower()] = counts.get(p.stem.lower(), 0) + 1
    return [p.stem if counts[p.stem.lower()] == 1 else f"{p.stem}_{p.suffix.lstrip('.')}" for p in photos]


def _resolve_stack(stack):
    """A StackFile from a StackFile, a Stack, a stack-file path or a preset name."""
    from physics.errors import InputError
    from physics.stack import Stack
    from physics.stackfile import StackFile, list_presets, load_preset, load_stack_file

    if isinstance(stack, StackFile):
        return stack
    if isinstance(stack, Stack):
        return StackFile(name="stack", scenario="", stack=stack)
    if not isinstance(stack, (str, os.PathLike)):
        raise InputError(f"stack is a stack file path, a preset name, a StackFile or a Stack; got "
                         f"{type(stack).__name__}.")
    path = Path(stack)
    looks_like_file = str(stack).lower().endswith(".json") or os.sep in str(stack) or path.exists()
    if not looks_like_file:
        return load_preset(str(stack))
    if not path.is_file():
        presets = ", ".join(stem for stem, _ in list_presets())
        raise InputError(f"Stack file {str(stack)!r} not found; give the path of a stack file (.json) or a "
                         f"preset name ({presets}).")
    try:
        content = path.read_bytes()
    except OSError as exc:
        raise InputError(f"Cannot read the stack file {str(stack)!r}: {exc.strerror or exc}.") from None
    try:
        return load_stack_file(content)
    except InputError as exc:
        raise InputError(f"stack file {path.name}: {exc}") from None


def _check_settings(sf, layer, window, box, reference, illuminant, angle_deg, nominal_nm, max_delta_e):
    """Checked, plain-typed settings, or InputError naming the bad one."""
    import numpy as np

    from physics.appearance import color_map
    from physics.errors import InputError, require_finite
    from physics.stackfile import dump_stack_file

    if isinstance(layer, bool) or not isinstance(layer, (int, np.integer)):
        raise InputError(f"layer is the index of the measured layer (0 = top); got {layer!r}.")
    n_layers = len(sf.stack.layers)
    if not 0 <= layer < n_layers:
        raise InputError(f"layer {layer} does not exist: the stack has {n_layers} layer(s), "
                         f"so give 0-{n_layers - 1} (0 = top)." if n_layers else
                         "The stack has no layer to measure; add the film as a layer.")
    w = require_finite("window", window, minimum=0.0, unit="nm").ravel()
    if w.size != 2 or not w[0] < w[1]:
        raise InputError(f"window is (lowest, highest) thickness in nm with lowest < highest; got {window!r}.")
    if box is not None:
        b = require_finite("box", box).ravel()
        if b.size != 4 or np.any(b != np.round(b)):
            raise InputError(f"box is four whole pixel numbers x0 y0 x1 y1; got {box!r}.")
        x0, y0, x1, y1 = (int(v) for v in b)
        if not (0 <= x0 < x1 and 0 <= y0 < y1):
            raise InputError(f"box ({x0}, {y0}, {x1}, {y1}) must have 0 <= x0 < x1 and 0 <= y0 < y1 "
                             "(x right, y down, ends exclusive).")
        box = (x0, y0, x1, y1)
    if isinstance(reference, str) and reference.strip().lower() == "substrate":
        reference = "substrate"
    else:
        try:
            reference = float(reference)
        except (TypeError, ValueError):
            raise InputError(f"reference is 'substrate' or a grey card's reflectance such as 0.18; "
                             f"got {reference!r}.") from None
        reference = float(require_finite("reference", reference, minimum=0.0, maximum=1.0, min_inclusive=False))
    if not isinstance(illuminant, str):
        raise InputError(f"illuminant is a lamp name such as D65; got {illuminant!r}.")
    angle = float(require_finite("angle_deg", angle_deg, minimum=0.0, maximum=89.9, unit="deg"))
    nominal = None if nominal_nm is None else float(require_finite("nominal_nm", nominal_nm, minimum=0.0, unit="nm"))
    max_de = float(require_finite("max_delta_e", max_delta_e, minimum=0.0, min_inclusive=False))
    color_map(sf.stack, layer, [float(w[0])], [angle], illuminant=illuminant)     # lamp, angle and materials work
    try:
        text = dump_stack_file(sf.stack, name=sf.name, scenario=sf.scenario, swept_layer=sf.swept_layer,
                               view=sf.view)
    except InputError as exc:
        raise InputError(f"The stack cannot be sent to the workers as a stack file: {exc}") from None
    return PhotoSettings(text, sf.name, sf.stack.layers[layer].material.name, int(layer), (float(w[0]), float(w[1])), box, reference, illuminant.strip(),
                         angle, nominal, max_de)


def _stack_description(sf, layer: int) -> str:
    st = sf.stack
    parts = [st.ambient.name]
    for i, lay in enumerate(st.layers):
        parts.append(f"{lay.material.name} (measured)" if i == layer else f"{lay.material.name} {lay.thickness_nm:g} nm")
    sub = st.substrate.name + ("" if st.substrate_thickness_mm is None else f" {st.substrate_thickness_mm:g} mm")
    parts.append(sub)
    return f"{sf.name}: " + " / ".join(parts)


# ---------------------------------------------------------------------- summary
def _csv_value(key, value) -> str:
    if key in _CSV_DECIMALS:
        return "" if value is None or not math.isfinite(value) else f"{value:.{_CSV_DECIMALS[key]}f}"
    return str(value).replace("\r", " ").replace("\n", " ")


def _write_summary(path: Path, rows: list[dict], header: list[str]) -> None:
    buf = io.StringIO()
    for line in header:
        buf.write("# " + line.replace("\r", " ").replace("\n", " ") + "\n")
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(SUMMARY_FIELDS)
    for row in rows:
        writer.writerow([_csv_value(k, row[k]) for k in SUMMARY_FIELDS])
    data = buf.getvalue().encode("utf-8")
    _save_atomic(path, lambda fh: fh.write(data))


def _summary_header(sf, s: PhotoSettings, photos_dir: Path, n: int) -> list[str]:
    box = "none (no calibration)" if s.box is None else (
        f"{' '.join(str(v) for v in s.box)} (x0 y0 x1 y1, pixels) = {_reference_text(s.reference)}")
    return [
        "fringegauge batch",
        f"date: {datetime.now().astimezone().isoformat(timespec='seconds')}",
        f"photos: {n} in {photos_dir}",
        f"stack: {_stack_description(sf, s.layer)}",
        f"layer: {s.layer}; window: {s.window[0]:g}-{s.window[1]:g} nm"
        + ("" if s.nominal_nm is None else f"; nominal: {s.nominal_nm:g} nm"),
        f"box: {box}",
        *([f"camera calibration: {s.calibration_name} (lab library)"] if s.calibration_text is not None else []),
        f"illuminant: {s.illuminant}; viewing angle: {s.angle_deg:g} deg; max delta E00: {s.max_delta_e:g}",
        f"thickness {NOT_METROLOGY}",
    ]


# ---------------------------------------------------------------------- distribution
def _open_client(scheduler, workers: int):
    """A Client (and the LocalCluster it owns, or None) for the run."""
    import logging
    import warnings

    from dask.distributed import Client, LocalCluster

    if scheduler:
        try:
            return Client(scheduler, timeout=f"{CONNECT_TIMEOUT_S}s"), None
        except Exception as exc:
            raise _input_error(f"Cannot reach the Dask scheduler at {scheduler!r} ({type(exc).__name__}: {exc}). "
                               "Check the address (tcp://host:port) and that the scheduler is running.") from None
    with warnings.catch_warnings():
        # With the dashboard off the scheduler still serves its small HTTP status routes on
        # 127.0.0.1, trying port 8787 first; another cluster on this machine makes it pick a free
        # port and warn, which is harmless here.
        warnings.filterwarnings("ignore", message=r"Port \d+ is already in use", category=UserWarning)
        cluster = LocalCluster(n_workers=workers, threads_per_worker=1, processes=True, host="127.0.0.1",
                               dashboard_address=None, silence_logs=logging.ERROR)
    try:
        return Client(cluster), cluster
    except Exception:
        cluster.close()
        raise


def _worker_slots(client) -> int:
    try:
        return max(1, len(client.scheduler_info().get("workers", {})))
    except Exception:
        return 1


def _distribute(client, jobs: list[tuple], rows: list[dict], progress: bool) -> None:
    """Run ``process_photo`` for each job, at most one per worker at a time; fill ``rows`` in place."""
    from dask.distributed import as_completed
    from tqdm import tqdm

    slots = _worker_slots(client)
    queue = iter(enumerate(jobs))
    pending = {}
    done = as_completed()

    def submit_next() -> None:
        item = next(queue, None)
        if item is not None:
            i, job = item
            future = client.submit(process_photo, *job, pure=False, key=f"fringegauge-photo-{i}-{os.getpid()}-"
                                                                         f"{time.time_ns()}")
            pending[future] = i
            done.add(future)

    for _ in range(slots):
        submit_next()
    failed = 0
    with tqdm(total=len(jobs), desc="photos", unit="photo", file=sys.stderr, disable=not progress,
              dynamic_ncols=True) as bar:
        for future in done:
            i = pending.pop(future)
            try:
                row = future.result()
            except Exception as exc:             # the worker died or the task could not run
                row = _error_row(Path(jobs[i][0]).name, f"the task failed on the cluster ({type(exc).__name__}: {exc})")
            finally:
                future.release()
            rows[i] = row
            failed += row["status"] != "ok"
            bar.update(1)
            bar.set_postfix(failed=failed, refresh=False)
            submit_next()


def run_batch(photos_dir, stack, *, layer: int = 0, window=(0, 1000), box=None, reference="substrate",
              illuminant: str = "D65", angle_deg: float = 0.0, nominal_nm: float | None = None,
              max_delta_e: float = 6.0, out_dir=None, scheduler: str | None = None, workers: int = 2,
              patterns=DEFAULT_PATTERNS, progress: bool = True, calibration: str | None = None,
              calibration_version: int | None = None, library=None) -> list[dict]:
    """Thickness maps of every photo in a folder, computed on a Dask cluster.

    Parameters
    ----------
    photos_dir : str or Path
        Folder of photos; files directly in it are used, subfolders are not.
    stack : str, Path, StackFile or Stack
        A stack-file path (``*.json``), a preset name (see ``physics.stackfile.list_presets``)
        or a stack object.
    layer : int
        Index of the measured layer, 0 = top.
    window : (lo, hi)
        Thickness window searched, nm.
    box : (x0, y0, x1, y1) or None
        Calibration box in pixels (x right, y down, ends exclusive); None = no calibration.
    reference : "substrate" or float
        What the box shows: bare substrate, or a grey card of this reflectance (e.g. 0.18).
    illuminant : str
        The lamp, e.g. "D65".
    angle_deg : float
        Viewing angle, degrees from the normal.
    nominal_nm : float, optional
        Target thickness; breaks order ambiguity where continuity cannot.
    max_delta_e : float
        Pixels matching worse than this CIEDE2000 difference are left empty (NaN).
    out_dir : str or Path, optional
        Output folder, created if missing; default ``photos_dir/thickness_maps``.
    scheduler : str, optional
        Address of an existing dask.distributed scheduler (``tcp://host:port``). Default: a local
        cluster of ``workers`` processes on 127.0.0.1, closed at the end.
    workers : int
        Worker processes of the local cluster (one thread each); ignored with ``scheduler``.
    patterns : str or sequence of str
        File-name patterns (comma-separated in a string), matched case-insensitively.
    progress : bool
        Show a progress bar on stderr.
    calibration : str, optional
        Name of a camera calibration saved in the lab library (``camera_calibrations``); the maps use
        it (and its flat field) instead of the box's gains, and gain an uncertainty.
    calibration_version : int, optional
        Its version; default the newest.
    library : str or Path, optional
        The lab library folder; default ``FRINGEGAUGE_LIBRARY``, else ``./lab-library`` (as the page).

    Returns
    -------
    list of dict
        One row per photo in sorted order, keys :data:`SUMMARY_FIELDS`; ``status`` is "ok" or "error".
        The same rows are written to ``out_dir/summary.csv``.

    Notes
    -----
    The local cluster starts its workers as fresh processes that import the calling script
    again, so a script calling this function must do so under ``if __name__ == "__main__":``.

    Raises
    ------
    physics.errors.InputError
        Bad arguments, an unreadable stack, no matching photo, an output folder that cannot be
        made, or an unreachable scheduler. Problems with single photos never raise.
    """
    from physics.errors import InputError

    photos_dir = Path(photos_dir)
    if not photos_dir.is_dir():
        raise InputError(f"Photo folder {str(photos_dir)!r} does not exist or is not a folder.")
    if isinstance(workers, bool) or not isinstance(workers, int) or workers < 1:
        raise InputError(f"workers must be a whole number >= 1; got {workers!r}.")
    if scheduler is not None and (not isinstance(scheduler, str) or not scheduler.strip()):
        raise InputError(f"scheduler is an address such as tcp://127.0.0.1:8786; got {scheduler!r}.")
    sf = _resolve_stack(stack)
    settings = _check_settings(sf, layer, window, box, reference, illuminant, angle_deg, nominal_nm, max_delta_e)
    if calibration is not None:
        import dataclasses

        text, label = load_camera_calibration(calibration, calibration_version, library)
        settings = dataclasses.replace(settings, calibration_text=text, calibration_name=label)
    photos = find_photos(photos_dir, patterns)
    if not photos:
        raise InputError(f"No photo in {str(photos_dir)!r} matches {', '.join(_parse_patterns(patterns))}; "
                         "check the folder or give --pattern.")
    out = Path(out_dir) if out_dir is not None else photos_dir / OUT_SUBDIR
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"Cannot create the output folder {str(out)!r}: {exc.strerror or exc}.") from None
    if not os.access(out, os.W_OK):
        raise InputError(f"The output folder {str(out)!r} is not writable.")
    header = _summary_header(sf, settings, photos_dir, len(photos))
    jobs = [(str(p.resolve()), stem, str(out.resolve()), settings) for p, stem in zip(photos, _output_stems(photos))]
    rows: list[dict | None] = [None] * len(jobs)

    client, cluster = _open_client(scheduler.strip() if scheduler else None, min(workers, len(jobs)))
    try:
        _distribute(client, jobs, rows, progress)
    finally:
        try:
            client.close()
        finally:
            if cluster is not None:
                cluster.close()
        done = [r if r is not None else _error_row(Path(j[0]).name, "not computed: the batch was interrupted")
                for r, j in zip(rows, jobs)]
        _write_summary(out / "summary.csv", done, header)
    return done


def library_folder(library=None) -> Path:
    """The lab library folder: ``library``, else ``FRINGEGAUGE_LIBRARY``, else ``./lab-library``, as the page
    finds it (views.library.library_from_env)."""
    from library.store import DEFAULT_ROOT

    return Path(library) if library not in (None, "") else Path(os.environ.get(LIBRARY_ENV, "").strip() or DEFAULT_ROOT)


def load_camera_calibration(name, version=None, library=None) -> tuple[str, str]:
    """(text, "name vN") of a camera calibration in the lab library, checked as the page checks it.

    Raises InputError with a sentence: an unknown name (with the names there are), a corrupt or
    hand-made file, a library without a key, a folder that does not exist.
    """
    from library.store import (Library, ItemMissing, LibraryKeyError, error_text, load_or_create_key,
                               validate_camera_calibration)
    from physics.errors import InputError

    if not isinstance(name, str) or not name.strip():
        raise InputError(f"calibration is the name of a camera calibration in the lab library; got {name!r}.")
    root = library_folder(library)
    if not root.is_dir():
        raise InputError(f"The lab library folder {str(root)!r} does not exist; give --library FOLDER (the folder "
                         "the page's server uses) or set FRINGEGAUGE_LIBRARY.")
    try:                                  # the server's key, never a new one: a new key would trust nothing
        key = load_or_create_key(library_root=root, create=False)
    except LibraryKeyError as exc:
        raise InputError(f"The lab library's key cannot be read, so its calibrations cannot be checked: {exc} Run the "
                         "batch as the server's account, or set FRINGEGAUGE_LIBRARY_KEY_FILE to the server's key "
                         "file.") from None
    lib = Library(root, key=key)
    try:
        text = lib.load(CALIBRATION_KIND, name, version)
    except ItemMissing:
        try:
            names = sorted({e.name for e in lib.list(CALIBRATION_KIND)})
        except InputError:
            names = []
        there = (f"the library holds {', '.join(repr(n) for n in names[:12])}" + (" …" if len(names) > 12 else "")
                 if names else "the library holds no camera calibration yet (save one on the page)")
        what = f"version {version} of " if version is not None else ""
        raise InputError(f"There is no {what}camera calibration named {name!r} in {str(root)!r}; {there}.") from None
    except InputError as exc:
        raise InputError(error_text(exc)) from None
    try:
        validate_camera_calibration(text)
    except InputError as exc:
        raise InputError(f"The camera calibration {name!r} cannot be used: {exc}") from None
    chosen = [e for e in lib.list(CALIBRATION_KIND) if e.name.lower() == name.strip().lower()
              and (version is None or e.version == version)]
    label = f"{chosen[0].name} v{max(e.version for e in chosen)}" if chosen else name.strip()
    return text, label


# ---------------------------------------------------------------------- command line
def _reference_arg(text: str):
    if text.strip().lower() == "substrate":
        return "substrate"
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"give 'substrate' or a grey card's reflectance such as 0.18, "
                                         f"not {text!r}") from None
    if not 0.0 < value <= 1.0:
        raise argparse.ArgumentTypeError(f"a reflectance lies in (0, 1], not {text}")
    return value


def _positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"give a whole number >= 1, not {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"give a whole number >= 1, not {value}")
    return value


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of ``python -m batch``.

    Returns
    -------
    argparse.ArgumentParser
    """
    p = argparse.ArgumentParser(
        prog=_PROG,
        description="Thickness maps of every photo in a folder, from colour, computed on a Dask cluster. "
                    "Writes <stem>_thickness.npy and .png per photo and summary.csv. Thickness is "
                    f"{NOT_METROLOGY}.",
        epilog="Exit status: 0 all photos ok, 1 some failed (see summary.csv), 2 bad arguments, "
               "unreadable stack, no photo found or scheduler unreachable.")
    p.add_argument("photos_dir", help="folder of photos (its subfolders are not read)")
    p.add_argument("--stack", required=True, metavar="STACK",
                   help="stack file (.json) or preset name, e.g. thermal_oxide_on_silicon")
    p.add_argument("--layer", type=int, default=0, help="index of the measured layer, 0 = top (default 0)")
    p.add_argument("--window", type=float, nargs=2, default=(0.0, 1000.0), metavar=("LO", "HI"),
                   help="thickness window searched, nm (default 0 1000)")
    p.add_argument("--box", type=int, nargs=4, default=None, metavar=("X0", "Y0", "X1", "Y1"),
                   help="calibration box in pixels, x right, y down, ends exclusive (needed without --calibration)")
    p.add_argument("--calibration", default=None, metavar="NAME",
                   help="a camera calibration saved in the lab library, by name: used instead of the box's gains, "
                        "and the summary gains the per-pixel uncertainty")
    p.add_argument("--calibration-version", type=_positive_int, default=None, metavar="N",
                   help="version of that calibration (default the newest)")
    p.add_argument("--library", default=None, metavar="FOLDER",
                   help=f"the lab library folder (default ${LIBRARY_ENV}, else ./lab-library, as the page)")
    p.add_argument("--reference", type=_reference_arg, default="substrate", metavar="substrate|R",
                   help="what the box shows: bare substrate (default) or a grey card of reflectance R, e.g. 0.18")
    p.add_argument("--illuminant", default="D65", help="lamp the photos were taken under (default D65)")
    p.add_argument("--angle", type=float, default=0.0, metavar="DEG",
                   help="viewing angle, degrees from the normal (default 0)")
    p.add_argument("--nominal", type=float, default=None, metavar="NM",
                   help="target thickness, nm; breaks fringe-order ties")
    p.add_argument("--max-delta-e", type=float, default=6.0, metavar="DE",
                   help="pixels matching worse than this CIEDE2000 difference are left empty (default 6)")
    p.add_argument("--out", default=None, metavar="OUT_DIR",
                   help=f"output folder (default PHOTOS_DIR/{OUT_SUBDIR})")
    p.add_argument("--scheduler", default=None, metavar="ADDRESS",
                   help="existing dask.distributed scheduler, e.g. tcp://10.0.0.5:8786 (default: a local cluster)")
    p.add_argument("--workers", type=_positive_int, default=2,
                   help="worker processes of the local cluster (default 2)")
    p.add_argument("--pattern", default=",".join(DEFAULT_PATTERNS),
                   help="comma-separated file-name patterns, case-insensitive (default %(default)s)")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    return p


def main(argv=None) -> int:
    """Run the command line.

    Parameters
    ----------
    argv : list of str, optional
        Arguments without the program name; default ``sys.argv[1:]``.

    Returns
    -------
    int
        0 every photo succeeded, 1 some failed, 2 bad arguments (or unreadable stack, no photo,
        unreachable scheduler), 130 interrupted.
    """
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:                    # argparse has printed its message
        return int(exc.code) if isinstance(exc.code, int) else 2
    from physics.errors import InputError

    if args.box is None and args.calibration is None:
        print(f"{_PROG}: error: give a calibration box (--box X0 Y0 X1 Y1 over bare substrate) or a camera "
              "calibration from the lab library (--calibration NAME).", file=sys.stderr)
        return 2
    try:
        rows = run_batch(args.photos_dir, args.stack, layer=args.layer, window=tuple(args.window),
                         box=None if args.box is None else tuple(args.box), calibration=args.calibration,
                         calibration_version=args.calibration_version, library=args.library,
                         reference=args.reference, illuminant=args.illuminant, angle_deg=args.angle,
                         nominal_nm=args.nominal, max_delta_e=args.max_delta_e, out_dir=args.out,
                         scheduler=args.scheduler, workers=args.workers, patterns=args.pattern,
                         progress=not args.quiet)
    except InputError as exc:
        print(f"{_PROG}: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print(f"{_PROG}: interrupted", file=sys.stderr)
        return 130
    out = Path(args.out) if args.out is not None else Path(args.photos_dir) / OUT_SUBDIR
    failed = [r for r in rows if r["status"] != "ok"]
    for r in failed:
        print(f"{r['file']}: {r['message']}", file=sys.stderr)
    print(f"{len(rows) - len(failed)} of {len(rows)} photo(s) ok, {len(failed)} failed; "
          f"summary: {out / 'summary.csv'}")
    return 1 if failed else 0

"""Batch thickness maps for line work: every photo in a folder, computed on a Dask cluster.

Run as ``python -m batch PHOTOS_DIR --stack STACK --box x0 y0 x1 y1 ...`` (see
:mod:`batch.cli`), or call :func:`run_batch` from Python. Each photo gives a
thickness map (``.npy``) and a figure (``.png``); one ``summary.csv`` lists every
photo with its status and statistics. Numbers come from :func:`physics.thickness_map`;
this package only finds files, distributes the work and writes the results.
"""

from .cli import DEFAULT_PATTERNS, SUMMARY_FIELDS, main, process_photo, run_batch

__all__ = ["run_batch", "process_photo", "main", "DEFAULT_PATTERNS", "SUMMARY_FIELDS"]

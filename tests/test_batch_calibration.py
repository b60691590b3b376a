"""The batch command with a camera calibration from the lab library: by name, with the uncertainty columns at
the end of the summary, and a bad name refused with exit status 2 and a sentence.

The photos are invented: an 8-step oxide-on-silicon reference sample and an oxide wedge, both seen by the
same made-up camera (a fixed channel mixing and a dark level), so that the box's gains cannot read them and
the calibration can.
"""

import csv
import sys
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:                    # worker processes inherit this path
    sys.path.insert(0, str(ROOT))

from batch import SUMMARY_FIELDS, main, run_batch  # noqa: E402
from batch.cli import load_camera_calibration  # noqa: E402
from library.store import Library  # noqa: E402
from physics import camera  # noqa: E402
from physics.appearance import color_map  # noqa: E402
from physics.errors import InputError  # noqa: E402
from physics.stackfile import load_preset  # noqa: E402
from views.camera_calibration import calibration_file_text  # noqa: E402

PRESET = "thermal_oxide_on_silicon"
W, H = 192, 48
STEPS_NM = (40.0, 90.0, 140.0, 190.0, 240.0, 300.0, 360.0, 420.0)
MIXING = np.array([[0.85, 0.12, 0.03], [0.08, 0.84, 0.08], [0.02, 0.15, 0.83]])
DARK = 0.03
#: The wedge's true thickness per column (nm), inside the steps' range.
WEDGE_NM = np.linspace(60.0, 400.0, W)


def _photo(thickness_per_column) -> np.ndarray:
    """8-bit sRGB photo, H rows, one column per thickness, through the invented camera."""
    srgb = np.clip(color_map(load_preset(PRESET).stack, 0, thickness_per_column, [0.0]).rgb[:, 0, :], 0, 1)
    lin = np.where(srgb <= 0.04045, srgb / 12.92, ((srgb + 0.055) / 1.055) ** 2.4)
    out = np.clip(lin @ MIXING.T * 0.9 + DARK, 0, 1)
    enc = np.where(out <= 0.0031308, 12.92 * out, 1.055 * out ** (1 / 2.4) - 0.055)
    return np.ascontiguousarray(np.broadcast_to(np.round(enc * 255).astype(np.uint8)[None], (H, W, 3)))


@pytest.fixture(scope="module")
def station(tmp_path_factory):
    """A lab library holding "Line 3 scope" fitted on the reference sample, and a folder with one wedge photo."""
    base = tmp_path_factory.mktemp("station")
    step_px = W // len(STEPS_NM)
    steps = _photo(np.repeat(STEPS_NM, step_px))
    boxes = [(i * step_px + 4, 8, (i + 1) * step_px - 4, H - 8) for i in range(len(STEPS_NM))]
    cal = camera.calibrate_from_reference(steps, boxes, list(STEPS_NM), load_preset(PRESET).stack, 0,
                                          window_nm=(0, 500), camera="line-3 scope", date="2026-12-04")
    lib = Library(base / "lab")
    lib.save("camera_calibrations", "Line 3 scope", calibration_file_text(cal, name="Line 3 scope"), user="ak")
    photos = base / "photos"
    photos.mkdir()
    Image.fromarray(_photo(WEDGE_NM)).save(photos / "wedge.png")
    return base, cal


def test_a_calibration_by_name_maps_with_it_and_adds_the_uncertainty_columns(station):
    base, cal = station
    assert SUMMARY_FIELDS[-3:] == ("uncertainty_median_nm", "uncertainty_p95_nm", "calibration")
    assert SUMMARY_FIELDS[:18][-1] == "order_outlier_fraction"          # older columns keep their positions
    out = base / "out"
    rows = run_batch(base / "photos", PRESET, window=(0, 500), calibration="line 3 SCOPE", library=base / "lab",
                     out_dir=out, workers=1, progress=False)
    assert [r["status"] for r in rows] == ["ok"], rows
    row = rows[0]
    assert row["calibration"] == "Line 3 scope v1"
    assert 0 < row["uncertainty_median_nm"] <= row["uncertainty_p95_nm"] < 100
    T = np.load(out / "wedge_thickness.npy")
    ok = np.abs(T - WEDGE_NM[None, :]) <= 10.0
    assert ok.mean() > 0.9, ok.mean()                                    # the calibration reads the camera
    text = (out / "summary.csv").read_text()
    assert "# camera calibration: Line 3 scope v1 (lab library)" in text
    table = list(csv.reader(line for line in text.splitlines() if not line.startswith("#")))
    assert tuple(table[0]) == SUMMARY_FIELDS and table[1][-1] == "Line 3 scope v1"


def test_a_bad_calibration_name_exits_2_with_a_sentence(station, capsys):
    base, _ = station
    code = main([str(base / "photos"), "--stack", PRESET, "--calibration", "Line 4 scope", "--library",
                 str(base / "lab"), "--quiet"])
    err = capsys.readouterr().err
    assert code == 2
    assert "no camera calibration named 'Line 4 scope'" in err and "'Line 3 scope'" in err
    code = main([str(base / "photos"), "--stack", PRESET, "--quiet"])
    assert code == 2 and "--calibration NAME" in capsys.readouterr().err
    with pytest.raises(InputError, match="does not exist"):
        load_camera_calibration("Line 3 scope", library=base / "no-such-folder")


def test_a_hand_edited_calibration_is_refused_not_used(station, tmp_path):
    base, cal = station
    lib = Library(tmp_path / "lab")
    lib.save("camera_calibrations", "Scope", calibration_file_text(cal, name="Scope"), user="ak")
    path = lib.path_for("camera_calibrations", "Scope")
    path.write_text(path.read_text().replace('"line-3 scope"', '"line-9 scope"'))
    with pytest.raises(InputError, match="cannot be loaded"):
        load_camera_calibration("Scope", library=tmp_path / "lab")


def test_without_the_server_s_key_the_batch_refuses_and_makes_no_key(station, tmp_path, monkeypatch):
    base, _ = station
    missing = tmp_path / "keys" / "library.key"
    monkeypatch.setenv("FRINGEGAUGE_LIBRARY_KEY_FILE", str(missing))
    with pytest.raises(InputError, match="key cannot be read.*FRINGEGAUGE_LIBRARY_KEY_FILE"):
        load_camera_calibration("Line 3 scope", library=base / "lab")
    assert not missing.exists()

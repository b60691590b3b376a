"""Batch thickness maps over a folder, run on real Dask clusters of worker processes.

The photos are synthetic: an oxide-on-silicon wedge drawn with the package's own forward
model (so the true thickness of every column is known), with a bare-silicon strip for the
calibration box, each photo under a different exposure or white balance.
"""

import csv
import re
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:                    # worker processes inherit this path
    sys.path.insert(0, str(ROOT))

from batch import SUMMARY_FIELDS, main, run_batch  # noqa: E402
from physics.appearance import color_map  # noqa: E402
from physics.errors import InputError  # noqa: E402
from physics.stackfile import dump_stack_file, load_preset  # noqa: E402

PRESET = "thermal_oxide_on_silicon"
W, H = 120, 80
BARE_COLUMNS = 20                                # columns 0..19 are bare silicon
BOX = (2, 2, 18, 78)
TRUE_NM = np.zeros(W)
TRUE_NM[BARE_COLUMNS:] = np.linspace(30.0, 480.0, W - BARE_COLUMNS)
KNOWN_COLUMNS = (45, 70, 110)
#: file name -> linear-light gains of the "camera" (exposure and white balance)
PHOTOS = {"wafer_a.png": (1.0, 1.0, 1.0), "wafer_b.PNG": (0.8, 0.8, 0.8), "wafer_c.tif": (0.9, 1.0, 1.12)}
CORRUPT = "wafer_d_corrupt.jpg"


def _encode(lin):
    lin = np.clip(lin, 0.0, 1.0)
    return np.where(lin <= 0.0031308, 12.92 * lin, 1.055 * lin ** (1 / 2.4) - 0.055)


def _decode(v):
    return np.where(v <= 0.04045, v / 12.92, ((v + 0.055) / 1.055) ** 2.4)


def _wedge(gains) -> np.ndarray:
    rgb = np.clip(color_map(load_preset(PRESET).stack, 0, TRUE_NM, [0.0]).rgb[:, 0, :], 0.0, 1.0)
    row = np.round(_encode(_decode(rgb) * np.asarray(gains)) * 255).astype(np.uint8)
    return np.ascontiguousarray(np.broadcast_to(row[None], (H, W, 3)))


@pytest.fixture(scope="module")
def cluster():
    from dask.distributed import LocalCluster

    c = LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                     dashboard_address=None)
    yield c
    c.close()


@pytest.fixture(scope="module")
def photos_dir(tmp_path_factory):
    d = tmp_path_factory.mktemp("photos")
    for name, gains in PHOTOS.items():
        Image.fromarray(_wedge(gains), "RGB").save(d / name)
    (d / CORRUPT).write_bytes(b"\xff\xd8\xff\xe0\x00\x10JFIF\x00" + bytes(range(256)) * 3)
    (d / "notes.txt").write_text("not a photo")
    return d


def _read_summary(path: Path):
    lines = path.read_text(encoding="utf-8").splitlines()
    comments = [ln for ln in lines if ln.startswith("#")]
    rows = list(csv.DictReader(ln for ln in lines if not ln.startswith("#")))
    return comments, rows


def _check_outputs(out: Path, rows):
    assert [r["file"] for r in rows] == sorted([*PHOTOS, CORRUPT], key=str.lower)
    assert [r["status"] for r in rows] == ["ok", "ok", "ok", "error"]
    bad = rows[-1]
    assert bad["file"] == CORRUPT and bad["message"] and np.isnan(bad["mean_nm"])
    assert not list(out.glob("wafer_d_corrupt_thickness.*"))
    for r in rows[:3]:
        stem = Path(r["file"]).stem
        values = np.load(out / f"{stem}_thickness.npy")
        assert values.shape == (H, W) and values.dtype == np.float32
        with Image.open(out / f"{stem}_thickness.png") as im:
            im.load()
            assert im.format == "PNG" and im.width > W
        for x in KNOWN_COLUMNS:
            assert abs(np.nanmedian(values[:, x]) - TRUE_NM[x]) < 15.0, (r["file"], x)
        assert r["valid_fraction"] > 0.9 and 0.0 <= r["min_nm"] < r["mean_nm"] < r["max_nm"]
        assert r["seconds"] > 0 and all(np.isfinite(r[k]) for k in ("gains_r", "gains_g", "gains_b"))
    # the dimmer photo needed more gain than the first
    assert rows[1]["gains_g"] > rows[0]["gains_g"] * 1.15
    comments, table = _read_summary(out / "summary.csv")
    assert comments[0] == "# fringegauge batch"
    text = "\n".join(comments)
    for word in ("date:", "stack: Thermal oxide on silicon", "window: 0-1000 nm", "box: 2 2 18 78", "D65",
                 "computed from colour; not certified metrology"):
        assert word in text
    assert len(table) == 4 and list(table[0]) == list(SUMMARY_FIELDS)
    assert [t["status"] for t in table].count("ok") == 3 and table[-1]["status"] == "error"
    assert table[-1]["message"] == bad["message"] and table[-1]["mean_nm"] == ""
    assert abs(float(table[0]["mean_nm"]) - rows[0]["mean_nm"]) < 0.01
    first = {k: float(table[0][k]) for k in ("min_nm", "p_low_nm", "median_nm", "p_high_nm", "max_nm")}
    assert first["min_nm"] <= first["p_low_nm"] <= first["median_nm"] <= first["p_high_nm"] <= first["max_nm"]
    assert table[-1]["median_nm"] == "" and 0 <= float(table[0]["order_outlier_fraction"]) < 0.05


def test_batch_on_a_given_scheduler(photos_dir, cluster, tmp_path):
    out = tmp_path / "maps"
    rows = run_batch(photos_dir, PRESET, layer=0, window=(0, 1000), box=BOX, out_dir=out,
                     scheduler=cluster.scheduler_address, progress=False)
    _check_outputs(out, rows)


def test_batch_on_the_default_local_cluster(photos_dir):
    rows = run_batch(photos_dir, PRESET, box=BOX, workers=2, progress=False)
    _check_outputs(photos_dir / "thickness_maps", rows)


def test_photo_problems_are_rows_not_failures(cluster, tmp_path):
    d = tmp_path / "line"
    d.mkdir()
    Image.fromarray(_wedge((1, 1, 1))[:40, :60], "RGB").save(d / "small.png")      # box runs off the image
    Image.fromarray(np.full((H, W, 3), 255, np.uint8), "RGB").save(d / "white.png")  # box fully clipped
    rows = run_batch(d, PRESET, box=BOX, scheduler=cluster.scheduler_address, progress=False)
    assert [r["status"] for r in rows] == ["error", "error"]
    assert re.search("outside|not inside", rows[0]["message"])
    assert "overexposed" in rows[1]["message"]


def test_bad_arguments_raise(photos_dir, tmp_path):
    with pytest.raises(InputError, match="window"):
        run_batch(photos_dir, PRESET, box=BOX, window=(500, 100), progress=False)
    with pytest.raises(InputError, match="layer 3"):
        run_batch(photos_dir, PRESET, box=BOX, layer=3, progress=False)
    with pytest.raises(InputError, match="reference"):
        run_batch(photos_dir, PRESET, box=BOX, reference=1.5, progress=False)
    with pytest.raises(InputError, match="No preset"):
        run_batch(photos_dir, "no_such_stack", box=BOX, progress=False)
    with pytest.raises(InputError, match="No photo"):
        run_batch(tmp_path, PRESET, box=BOX, progress=False)
    with pytest.raises(InputError, match="lluminant"):
        run_batch(photos_dir, PRESET, box=BOX, illuminant="candle", progress=False)


def _cli(*args):
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    return subprocess.run([sys.executable, "-m", "batch", *map(str, args)], cwd=ROOT, env=env,
                          capture_output=True, text=True, timeout=120)


def test_cli_exit_codes(photos_dir, cluster, tmp_path):
    sf = load_preset(PRESET)
    stack_file = tmp_path / "oxide.json"
    stack_file.write_text(dump_stack_file(sf.stack, name="line 3 oxide"), encoding="utf-8")
    common = ["--stack", stack_file, "--box", *BOX, "--scheduler", cluster.scheduler_address, "--quiet"]

    one = _cli(photos_dir, *common, "--pattern", "*.TIF", "--out", tmp_path / "one")
    assert one.returncode == 0, one.stderr
    assert (tmp_path / "one" / "wafer_c_thickness.npy").is_file()
    _, table = _read_summary(tmp_path / "one" / "summary.csv")
    assert [t["file"] for t in table] == ["wafer_c.tif"]

    some = _cli(photos_dir, *common, "--out", tmp_path / "all")
    assert some.returncode == 1, some.stderr
    assert CORRUPT in some.stderr
    assert len(_read_summary(tmp_path / "all" / "summary.csv")[1]) == 4


def test_cli_bad_arguments_exit_2(photos_dir, tmp_path, capsys):
    missing_stack = _cli(photos_dir, "--box", *BOX)
    assert missing_stack.returncode == 2 and "--stack" in missing_stack.stderr
    broken = tmp_path / "broken.json"
    broken.write_text("{not json", encoding="utf-8")
    unreadable = _cli(photos_dir, "--stack", broken, "--box", *BOX)
    assert unreadable.returncode == 2 and "not valid JSON" in unreadable.stderr

    assert main([str(photos_dir), "--stack", PRESET, "--box", "1", "2", "3"]) == 2
    assert main([str(photos_dir), "--stack", PRESET, "--box", *map(str, BOX), "--reference", "grey"]) == 2
    assert main([str(photos_dir), "--stack", PRESET, "--box", *map(str, BOX), "--workers", "0"]) == 2
    assert main([str(tmp_path / "nowhere"), "--stack", PRESET, "--box", *map(str, BOX)]) == 2
    assert main([str(photos_dir), "--stack", str(tmp_path / "missing.json"), "--box", *map(str, BOX)]) == 2
    err = capsys.readouterr().err
    assert "does not exist" in err and "not found" in err


def test_default_patterns_cover_the_raw_formats():
    """The batch finds every RAW/DNG file the image reader reads, beside JPEG, PNG and TIFF."""
    from batch import DEFAULT_PATTERNS
    from physics.imageio import RAW_EXTENSIONS
    assert set(DEFAULT_PATTERNS) == {"*.jpg", "*.jpeg", "*.png", "*.tif", "*.tiff"} | {"*" + e for e in RAW_EXTENSIONS}

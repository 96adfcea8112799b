"""surfrec.io.inspection and `surfrec inspect` on disparity.h5 and heights.h5.

The summaries are streamed over the frames in blocks; each figure is checked
against numpy on the whole arrays read at once with h5py (the reference
reader of HDF5).
"""

import json
import subprocess
import sys

import h5py
import numpy as np
import pytest

from surfrec.io import inspection
from surfrec.io.disparityfile import DisparityWriter
from surfrec.io.heightsfile import FLAG_BLANK, FLAG_DROPPED, FLAG_FEW_HEIGHTS

from synthetic_heights import write_exact_heights


@pytest.fixture(scope="module")
def heights(quick_session, tmp_path_factory):
    truth = quick_session("waves") / "truth.h5"
    work = tmp_path_factory.mktemp("inspect")
    blank = np.zeros((73, 97), bool)
    blank[:10, :20] = True
    flags = np.array([0, FLAG_DROPPED, 0, FLAG_BLANK | FLAG_FEW_HEIGHTS, 0, 0], np.uint8)
    write_exact_heights(truth, work / "heights.h5", noise_mm=0.01, blank=blank, flags=flags,
                        attrs={"still_correction": True, "rig_sha256": "ab" * 32, "match_param_window": 17,
                               "datum_attributes": json.dumps({"origin_mm": [10.0, -5.0], "rotate_deg": 2.0})})
    return work / "heights.h5"


@pytest.fixture(scope="module")
def disparity(tmp_path_factory):
    rng = np.random.default_rng(0)
    path = tmp_path_factory.mktemp("inspect-disp") / "disparity.h5"
    u, v = np.arange(12.0, 200.0, 4.0), np.arange(12.0, 150.0, 4.0)
    w = DisparityWriter(path, u, v, attrs={"param_window": 17, "rig_sha256": "cd" * 32, "frames": "0:9:1",
                                           "history": "surfrec match ..."}, n_frames=9)
    frames = []
    for i in range(9):
        d = (3.0 + rng.normal(0, 0.4, (v.size, u.size))).astype(np.float32)
        d[rng.random(d.shape) < 0.05 * i] = np.nan
        s = np.where(np.isfinite(d), rng.uniform(0.003, 0.02, d.shape), np.nan).astype(np.float32)
        sc = np.where(np.isfinite(d), rng.uniform(0.8, 1.0, d.shape), np.nan).astype(np.float32)
        w.append(time=i / 250.0 if i != 5 else 5.5 / 250.0, frame_index=i, flags=0, disparity=d,
                 disparity_sigma=s, score=sc)
        frames.append((d, s))
    w.close()
    return path, frames


def test_heights_summary_matches_numpy(heights, monkeypatch):
    # Small blocks force several passes: the streamed figures must not depend on them
    # (summaries round to 6 significant digits).
    monkeypatch.setattr(inspection, "STREAM_BLOCK_BYTES", 1)
    s = inspection.summarise(heights)
    with h5py.File(heights, "r") as f:
        h = f["height"][()]
        sig = f["height_uncertainty"][()]
        foot = f["footprint"][()] != 0
        t = f["time"][()]
    assert s["format"] == "surfrec.heights" and s["dimensions"] == {"time": 6, "y": 73, "x": 97}
    assert s["height_range_mm"] == [pytest.approx(np.nanmin(h), rel=1e-5), pytest.approx(np.nanmax(h), rel=1e-5)]
    cover = [np.isfinite(f[foot]).mean() for f in h]
    assert s["coverage_percent"]["mean"] == pytest.approx(100 * np.mean(cover), rel=1e-4)
    assert s["coverage_percent"]["min"] == pytest.approx(100 * np.min(cover), rel=1e-4)
    assert s["median_uncertainty_mm"] == pytest.approx(np.median([np.median(x[np.isfinite(x)]) for x in sig]))
    # The run's clock: 500 frames/s (docs/synthetic-sessions.md, the waves scenario).
    assert s["time"]["frame_rate_hz"] == pytest.approx(1 / np.median(np.diff(t))) == pytest.approx(500.0)
    assert s["grid"]["x"]["step_mm"] == 2.5 and s["grid"]["y"]["range_mm"] == [-90.0, 90.0]
    assert s["frame_flags"] == {"clean": 4, "dropped": 1, "unreadable": 0, "blank": 1, "few_valid_points": 0,
                                "few_valid_heights": 1}
    p = s["provenance"]
    assert p["still_correction"] == "on" and p["rig_sha256"] == "ab" * 32 and p["history"] == "test fixture"
    assert p["datum_origin_mm"] == [10.0, -5.0] and p["datum_rotate_deg"] == 2.0
    assert s["matcher"] == {"window": 17}


def test_disparity_summary_matches_numpy(disparity, monkeypatch):
    path, frames = disparity
    monkeypatch.setattr(inspection, "STREAM_BLOCK_BYTES", 20_000)
    s = inspection.summarise(path)
    d = np.stack([f[0] for f in frames])
    assert s["dimensions"] == {"time": 9, "v": d.shape[1], "u": d.shape[2]}
    assert s["disparity_range_px"] == [pytest.approx(np.nanmin(d), rel=1e-5), pytest.approx(np.nanmax(d), rel=1e-5)]
    valid = np.isfinite(d).mean(axis=(1, 2))
    assert s["valid_percent"]["mean"] == pytest.approx(100 * valid.mean(), rel=1e-4)
    assert s["valid_percent"]["min"] == pytest.approx(100 * valid.min(), rel=1e-4)
    assert s["median_sigma_px"] == pytest.approx(np.median([np.median(f[1][np.isfinite(f[1])]) for f in frames]),
                                                 rel=1e-5)
    # One late frame: the time axis is irregular, which the summary says.
    assert s["time"]["regular"] is False and s["time"]["frame_rate_hz"] == pytest.approx(250.0)
    assert s["matcher"]["window"] == 17 and s["provenance"]["rig_sha256"] == "cd" * 32


def test_text_form_is_aligned_and_complete(heights):
    text = inspection.format_text(inspection.summarise(heights))
    lines = text.splitlines()
    assert lines[0] == f"{heights}: height fields of a run (surfrec.heights v1)"
    assert any(line.strip() == "dimensions                 time 6, y 73, x 97" for line in lines)
    assert "still_correction  on" in text and "few_valid_heights  1" in text
    assert max(len(line) for line in lines) <= 100  # wrapped for a terminal


def test_inspect_cli_text_and_json(heights, disparity):
    for path, fmt in ((heights, "surfrec.heights"), (disparity[0], "surfrec.disparity")):
        res = subprocess.run([sys.executable, "-m", "surfrec.cli.main", "inspect", str(path), "--json"],
                             capture_output=True, text=True)
        assert res.returncode == 0, res.stderr
        assert json.loads(res.stdout)["format"] == fmt  # one JSON object on stdout (docs/conventions.md)
    res = subprocess.run([sys.executable, "-m", "surfrec.cli.main", "inspect", str(heights)], capture_output=True,
                         text=True)
    assert res.returncode == 0 and "coverage_percent" in res.stdout and "median_uncertainty_mm" in res.stdout

"""`surfrec heights` as a user calls it: the product on a quick session, exit codes and messages.

Accuracy is checked against the session's exact surface in the true geometry
(issue 5): each output node (x, y, h) is mapped through the file's
world_to_left_camera and the true left-camera pose into the tank frame and
compared with the surface there. Quick sessions (512x384 px) match less
precisely than the default session (the matcher's own per-point error is
about 0.04 mm there), so the bounds here are looser than the issue's
targets: RMS <= 0.06 mm, |bias| <= 0.01 mm, coverage >= 95%.
"""

import json
import shutil

import h5py
import numpy as np
import pytest

from surfrec.io.datumfile import read_datum
from surfrec.io.heightsfile import read_heights
from surfrec.io.rigfile import file_sha256, write_rig
from surfrec.io.truthfile import read_truth
from surfrec.synth.cameras import Camera
from surfrec.synth.surfaces import surface_from_dict
from cli_run import run


@pytest.fixture(scope="module")
def prepared(quick_session, make_true_rig, tmp_path_factory):
    s = quick_session("waves")
    work = tmp_path_factory.mktemp("heights-cli")
    rig = work / "rig.json"
    write_rig(make_true_rig(s / "truth.h5"), rig)
    datum = work / "datum.h5"
    res = run("datum", "--rig", rig, "--left", s / "still" / "left", "--right", s / "still" / "right", "-o", datum,
              "-q")
    assert res.returncode == 0, res.stderr
    disp = work / "disp.h5"
    res = run("match", "--rig", rig, "--datum", datum, "--left", s / "waves" / "left", "--right", s / "waves" / "right",
              "--timestamps", s / "waves" / "timestamps.csv", "-o", disp, "-q")
    assert res.returncode == 0, res.stderr
    out = work / "heights.h5"
    res = run("heights", disp, "--rig", rig, "--datum", datum, "-o", out)
    assert res.returncode == 0, res.stderr
    assert res.stdout.strip() == str(out)
    return dict(s=s, work=work, rig=rig, datum=datum, disp=disp, out=out, log=res.stderr)


def _truth_errors(r, truth_path):
    t = read_truth(truth_path)
    left = Camera.from_dict(t["rigs"]["rig"]["left"])
    surface = surface_from_dict(t["groups"]["waves"]["surface"])
    times = np.asarray(t["groups"]["waves"]["time"])
    m = r["attrs"]["world_to_left_camera"]
    xx, yy = np.meshgrid(r["x"], r["y"])
    errs, cover = [], []
    for i, h in enumerate(r["height"].astype(np.float64)):
        cam = np.stack([xx, yy, h], -1) @ m[:3, :3].T + m[:3, 3]
        w = (cam - left.translation) @ left.rotation          # X_world = R^T (X_cam - t)
        e = w[..., 2] - surface.height(w[..., 0], w[..., 1], times[i])
        ok = r["footprint"] & np.isfinite(e)
        errs.append(e[ok])
        cover.append(ok.sum() / r["footprint"].sum())
    return np.concatenate(errs), np.array(cover)


def test_heights_match_the_exact_surface(prepared):
    r = read_heights(prepared["out"])
    e, cover = _truth_errors(r, prepared["s"] / "truth.h5")
    rms, bias = float(np.sqrt(np.mean(e ** 2))), float(np.mean(e))
    assert rms <= 0.06, rms
    assert abs(bias) <= 0.01, bias
    assert cover.min() >= 0.95, cover
    # The random 1-sigma: |dh/dd| sigma_d, about 2.4 mm/px here times the matcher's ~0.005 px.
    sig = np.nanmedian(r["height_uncertainty"])
    assert 0.005 < sig < 0.03, sig
    assert np.isfinite(r["height"]).sum() == np.isfinite(r["height_uncertainty"]).sum()


def test_file_records_the_provenance(prepared):
    r = read_heights(prepared["out"])
    a = r["attrs"]
    assert a["rig_sha256"] == file_sha256(prepared["rig"]) and a["datum_sha256"] == file_sha256(prepared["datum"])
    assert a["disparity_sha256"] == file_sha256(prepared["disp"])
    assert json.loads(a["rig_json"]) == json.loads(prepared["rig"].read_text())
    datum_attrs = json.loads(a["datum_attributes"])
    assert datum_attrs["rig_sha256"] == a["rig_sha256"] and len(datum_attrs["world_to_left_camera"]) == 16
    np.testing.assert_allclose(a["world_to_left_camera"], read_datum(prepared["datum"]).world_to_left_camera)
    assert a["history"].startswith("surfrec heights ") and a["source"].startswith("surfrec ")
    assert a["still_correction"] == 1 and a["grid_step_mm"] > 0 and len(a["extent_mm"]) == 4
    assert "match_param_window" in a and np.isfinite(a["height_systematic_mm"])
    assert r["time"].size == 6 and np.allclose(np.diff(r["time"]), 1 / 500.0)
    assert "seconds since" in r["time_units"]


def test_no_still_correction_leaves_the_datum_residual_in(prepared):
    # Reference: the datum's own still residual (datum.h5), interpolated at the nodes.
    out = prepared["work"] / "raw.h5"
    res = run("heights", prepared["disp"], "--rig", prepared["rig"], "--datum", prepared["datum"], "-o", out,
              "--no-still-correction", "-q")
    assert res.returncode == 0, res.stderr
    raw, cor = read_heights(out), read_heights(prepared["out"])
    assert raw["attrs"]["still_correction"] == 0
    xx, yy = np.meshgrid(cor["x"], cor["y"])
    still = read_datum(prepared["datum"]).still_residual_at(xx, yy)
    both = np.isfinite(raw["height"]) & np.isfinite(cor["height"])
    diff = (raw["height"].astype(float) - cor["height"])[both]
    np.testing.assert_allclose(diff, np.broadcast_to(still, raw["height"].shape)[both], atol=2e-6)


def test_exclusions_blank_nodes(prepared):
    poly = prepared["work"] / "wall.csv"
    poly.write_text("# a wall along the top edge, datum frame mm\nx,y\n-300, 60\n300, 60\n300, 300\n-300, 300\n")
    out = prepared["work"] / "excl.h5"
    res = run("heights", prepared["disp"], "--rig", prepared["rig"], "--datum", prepared["datum"], "-o", out,
              "--exclude-circle", "10,-20,15", "--exclude-polygon", poly, "--grid-step", "3", "-q")
    assert res.returncode == 0, res.stderr
    r = read_heights(out)
    xx, yy = np.meshgrid(r["x"], r["y"])
    gone = (np.hypot(xx - 10, yy + 20) < 14.9) | (yy > 60.1)
    assert np.isnan(r["height"][:, gone]).all() and not r["footprint"][gone].any()
    assert np.isfinite(r["height"][:, ~gone & r["footprint"]]).mean() > 0.95
    assert np.allclose(np.diff(r["x"]), 3.0) and r["attrs"]["grid_step_mm"] == 3.0
    assert json.loads(r["attrs"]["exclude_circles_mm"]) == [[10.0, -20.0, 15.0]]


def test_refuses_to_overwrite(prepared):
    out = prepared["work"] / "keep.h5"
    out.write_text("keep me")
    res = run("heights", prepared["disp"], "--rig", prepared["rig"], "--datum", prepared["datum"], "-o", out)
    assert res.returncode == 2 and "already exists" in res.stderr
    assert out.read_text() == "keep me"


def test_bad_input_gives_one_line_and_exit_2(prepared):
    p = prepared
    work = p["work"]
    other_rig = work / "other_rig.json"
    shutil.copy(p["rig"], other_rig)
    other_rig.write_text(other_rig.read_text().replace('"created"', '"note": "x", "created"', 1))
    other_datum = work / "other_datum.h5"
    shutil.copy(p["datum"], other_datum)
    with h5py.File(other_datum, "a") as f:
        f.attrs["history"] = "another still-water run"
    bad_poly = work / "bad.csv"
    bad_poly.write_text("0,0\n1;2;3\n")
    cases = [
        (["--rig", other_rig], "was made with another rig"),
        (["--datum", other_datum], "was made with another datum"),
        (["--extent", "1000,2000,1000,2000"], "outside the measured area"),
        (["--grid-step", "0.001"], "above the limit of 50,000,000"),
        (["--extent", "5,1,0,2"], "XMIN < XMAX"),
        (["--exclude-circle", "1,2"], "X,Y,R"),
        (["--exclude-polygon", bad_poly], "line 2"),
    ]
    for extra, message in cases:
        args = {"--rig": p["rig"], "--datum": p["datum"]}
        rest = []
        for i in range(0, len(extra), 2):
            if extra[i] in args:
                args[extra[i]] = extra[i + 1]
            else:
                rest += extra[i:i + 2]
        out = work / "bad.h5"
        res = run("heights", p["disp"], "--rig", args["--rig"], "--datum", args["--datum"], "-o", out, *rest)
        assert res.returncode == 2, (extra, res.stderr)
        assert message in res.stderr, (extra, res.stderr)
        assert len(res.stderr.strip().splitlines()) == 1 and "Traceback" not in res.stderr, res.stderr
        assert not out.exists()
    res = run("heights", work / "missing.h5", "--rig", p["rig"], "--datum", p["datum"], "-o", work / "m.h5")
    assert res.returncode == 2 and "does not exist" in res.stderr
    assert not list(work.glob(".*.partial-*"))

"""`surfrec match` as a user calls it: outputs, exit codes and messages (docs/conventions.md error policy)."""

import shutil

import numpy as np
import pytest

from surfrec.io.disparityfile import read_disparity
from surfrec.io.rigfile import write_rig
from cli_run import run


@pytest.fixture(scope="module")
def prepared(quick_session, make_true_rig, tmp_path_factory):
    s = quick_session("waves")
    work = tmp_path_factory.mktemp("match-cli")
    rig = work / "rig.json"
    write_rig(make_true_rig(s / "truth.h5"), rig)
    datum = work / "datum.h5"
    res = run("datum", "--rig", rig, "--left", s / "still" / "left", "--right", s / "still" / "right", "-o", datum, "-q")
    assert res.returncode == 0, res.stderr
    return s, work, rig, datum


def test_match_writes_the_contract(prepared):
    s, work, rig, datum = prepared
    out = work / "disp.h5"
    res = run("match", "--rig", rig, "--datum", datum, "--left", f"{s}/waves/left/*.png", "--right",
              s / "waves" / "right", "--timestamps", s / "waves" / "timestamps.csv", "-o", out, "--stop", 4, "-q")
    assert res.returncode == 0, res.stderr
    d = read_disparity(out)
    # docs/conventions.md: disparity (T, Nv, Nu) float32, time in s from the first frame, frame_flags uint8.
    assert d["disparity"].shape == (4, len(d["v"]), len(d["u"])) and d["disparity"].dtype == np.float32
    np.testing.assert_allclose(d["time"], np.arange(4) / 500.0, atol=1e-9)
    assert d["frame_flags"].dtype == np.uint8 and not d["frame_flags"].any()
    assert np.isfinite(d["disparity"]).mean() > 0.9
    assert np.nanmedian(d["disparity_sigma"]) < 0.02
    assert d["attrs"]["rig_sha256"] and d["attrs"]["datum_sha256"]
    # --start/--step pick frames by index; a frame's result depends only on its own time window.
    out2 = work / "disp2.h5"
    res = run("match", "--rig", rig, "--datum", datum, "--left", s / "waves" / "left", "--right",
              s / "waves" / "right", "--fps", 500, "-o", out2, "--start", 2, "--stop", 4, "-q")
    assert res.returncode == 0, res.stderr
    d2 = read_disparity(out2)
    np.testing.assert_array_equal(d2["frame_index"], [2, 3])
    np.testing.assert_array_equal(d2["disparity"], d["disparity"][2:4])


def test_refuses_to_overwrite(prepared):
    s, work, rig, datum = prepared
    out = work / "exists.h5"
    out.write_text("keep me")
    res = run("match", "--rig", rig, "--datum", datum, "--left", s / "waves" / "left", "--right",
              s / "waves" / "right", "--fps", 500, "-o", out)
    assert res.returncode == 2 and "already exists" in res.stderr
    assert out.read_text() == "keep me"


def _bad_cases(s, work, rig, datum):
    other_rig = work / "other_rig.json"
    shutil.copy(rig, other_rig)
    other_rig.write_text(other_rig.read_text().replace('"created"', '"note": "x", "created"', 1))
    short = work / "short.csv"
    short.write_text("frame,left_s,right_s\n0,0,0\n1,0.002,0.002\n")
    fewer = work / "fewer"
    fewer.mkdir(exist_ok=True)
    for p in sorted((s / "waves" / "right").glob("*.png"))[:5]:
        shutil.copy(p, fewer / p.name)
    return [
        (["--rig", other_rig], "made with another rig"),
        (["--fps", 500, "--timestamps", s / "waves" / "timestamps.csv"], "exactly one of --fps or --timestamps"),
        (["--timestamps", short], "has 2 rows but there are 6 frame pairs"),
        (["--right", fewer], "6 frames but right images: 5 frames"),
        (["--left", s / "target" / "left"], "16 frames but right images: 6 frames"),
        (["--start", 10], "selects no frames"),
        (["--window", 14], "must be an odd whole number"),
        (["--datum", rig], "not a readable HDF5 file"),
    ]


def test_bad_input_one_line_status_2(prepared):
    s, work, rig, datum = prepared
    for extra, message in _bad_cases(s, work, rig, datum):
        args = {"--rig": rig, "--datum": datum, "--left": s / "waves" / "left", "--right": s / "waves" / "right",
                "--fps": 500}
        extra_keys = [extra[i] for i in range(0, len(extra), 2)]
        if "--timestamps" in extra_keys and "--fps" not in extra_keys:
            args.pop("--fps")
        for k, v in zip(extra[::2], extra[1::2]):
            args[k] = v
        argv = ["match", "-o", work / "bad.h5"]
        for k, v in args.items():
            argv += [k, v]
        res = run(*argv)
        assert res.returncode == 2, (extra, res.stderr)
        assert message in res.stderr, (extra, res.stderr)
        assert res.stderr.count("\n") == 1 and "Traceback" not in res.stderr
        assert not (work / "bad.h5").exists()
        assert not list(work.glob(".bad.h5.partial-*"))


def test_time_window_and_mask(prepared):
    import cv2

    s, work, rig, datum = prepared
    whole = work / "tw_whole.h5"
    part = work / "tw_part.h5"
    base = ["match", "--rig", rig, "--datum", datum, "--left", s / "waves" / "left", "--right", s / "waves" / "right",
            "--fps", 500, "--time-window", 3, "--window", 11, "-q"]
    assert run(*base, "-o", whole).returncode == 0
    res = run(*base, "-o", part, "--start", 2, "--stop", 4)
    assert res.returncode == 0, res.stderr
    # docs/conventions.md: a frame's result depends only on the frames of its own time window, so a part of
    # the run equals the same frames of the whole run, bit for bit.
    np.testing.assert_array_equal(read_disparity(part)["disparity"], read_disparity(whole)["disparity"][2:4])
    d = read_disparity(whole)
    assert np.isfinite(d["disparity"]).mean() > 0.9
    assert read_disparity(whole)["attrs"]["param_time_window"] == 3

    # A mask (left camera image, non-zero = measure) that leaves out the right half of the image.
    mask = np.zeros((384, 512), np.uint8)
    mask[:, :256] = 255
    cv2.imwrite(str(work / "mask.png"), mask)
    masked = work / "masked.h5"
    res = run("match", "--rig", rig, "--datum", datum, "--left", s / "waves" / "left", "--right",
              s / "waves" / "right", "--fps", 500, "--stop", 1, "--mask", work / "mask.png", "-o", masked, "-q")
    assert res.returncode == 0, res.stderr
    dm = read_disparity(masked)
    valid_u = dm["u"][np.isfinite(dm["disparity"][0]).any(axis=0)]
    # Rectification moves the mask edge by a few px only (the rectifying rotation is small).
    assert valid_u.max() < 256 + 20 and valid_u.min() < 60
    assert np.isfinite(dm["disparity"][0]).mean() < 0.6

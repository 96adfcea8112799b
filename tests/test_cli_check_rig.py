"""`surfrec check-rig` as a user calls it: exit codes, messages, the JSON summary.

Exit statuses and message forms are fixed by docs/conventions.md ("Exit status") and
issue 3; the rigs are the exact cameras of `surfrec synth --quick` sessions.
"""

import json
import subprocess
import sys

import cv2
import pytest

from surfrec.io.rigfile import write_rig


def run(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "surfrec.cli.main", "check-rig", *map(str, args)],
                          capture_output=True, text=True, cwd=cwd)


@pytest.fixture(scope="module")
def rigs(quick_session, make_true_rig, tmp_path_factory):
    d = tmp_path_factory.mktemp("rigs")
    waves = quick_session("waves")
    moved = quick_session("moved")
    paths = {"waves": d / "waves-rig.json", "pre": d / "pre-move-rig.json", "post": d / "post-move-rig.json"}
    write_rig(make_true_rig(waves / "truth.h5", "rig"), paths["waves"])
    write_rig(make_true_rig(moved / "truth.h5", "rig"), paths["pre"])
    write_rig(make_true_rig(moved / "truth.h5", "moved"), paths["post"])
    return waves, moved, paths


def one_line(stderr):
    lines = [l for l in stderr.splitlines() if l.strip()]
    assert len(lines) == 1, stderr
    return lines[0]


def test_true_rig_holds_text_and_json(rigs):
    waves, _, paths = rigs
    res = run("--rig", paths["waves"], "--left", waves / "waves" / "left", "--right", waves / "waves" / "right", "-q")
    assert res.returncode == 0, res.stderr
    assert res.stdout.splitlines()[-1] == "rig holds"
    assert "95th percentile of |dv|" in res.stdout and "in step" in res.stdout
    res = run("--rig", paths["waves"], "--left", waves / "waves" / "left", "--right", waves / "waves" / "right",
              "--json", "--frames", "3", "-q")
    assert res.returncode == 0, res.stderr
    s = json.loads(res.stdout)  # one object, nothing else
    assert s["format"] == "surfrec.check-rig" and s["holds"] is True and s["message"] == "rig holds"
    assert s["n_frames"] == 3 and len(s["left"]) == 3 and len(s["rig_sha256"]) == 64
    vd = s["vertical_disparity"]
    assert vd["p95_abs_px"] < 0.1 and vd["tolerance_px"] == 0.3 and vd["n_points"] > 300
    assert s["sync"]["offset_frames"] == 0 and s["sync"]["determined"] is True


def test_moved_camera_exits_3_and_post_move_rig_holds(rigs):
    _, moved, paths = rigs
    frames = ["--left", moved / "waves" / "left", "--right", moved / "waves" / "right"]
    res = run("--rig", paths["pre"], *frames, "-q")
    assert res.returncode == 3
    assert one_line(res.stderr) == "surfrec: rig has moved: recalibrate (or re-pose with --keep-intrinsics)"
    assert "implied roll +0.19" in res.stdout or "implied roll +0.20" in res.stdout  # 0.2 deg in the scenario
    res = run("--rig", paths["post"], *frames, "-q", "--frames", "3")
    assert res.returncode == 0 and res.stdout.splitlines()[-1] == "rig holds"
    # A tolerance above the roll's 95th percentile (about 0.8 px) passes the same frames.
    res = run("--rig", paths["pre"], *frames, "-q", "--frames", "2", "--tolerance", "2")
    assert res.returncode == 0, res.stderr


def test_frames_out_of_step_exit_3(rigs, tmp_path):
    # Left frames 0-4 with right frames 1-5, through @LIST files.
    waves, _, paths = rigs
    left = sorted((waves / "waves" / "left").glob("*.png"))
    right = sorted((waves / "waves" / "right").glob("*.png"))
    (tmp_path / "left.txt").write_text("\n".join(map(str, left[:5])) + "\n")
    (tmp_path / "right.txt").write_text("# one frame late\n" + "\n".join(map(str, right[1:6])) + "\n")
    res = run("--rig", paths["waves"], "--left", "@left.txt", "--right", "@right.txt", "-q", cwd=tmp_path)
    assert res.returncode == 3
    assert one_line(res.stderr).startswith("surfrec: cameras out of step by 1 frames")


# ----------------------------------------------------------------- bad input: one line, exit 2


def test_corrupt_or_incomplete_rig(rigs, tmp_path):
    waves, _, paths = rigs
    frames = ["--left", waves / "waves" / "left", "--right", waves / "waves" / "right"]
    bad = tmp_path / "rig.json"
    bad.write_text('{"format": "surfrec.rig", "version": 1,')
    res = run("--rig", bad, *frames)
    assert res.returncode == 2 and "is not valid JSON" in one_line(res.stderr)
    d = json.loads(paths["waves"].read_text())
    del d["rectification"]["P2"]
    bad.write_text(json.dumps(d))
    res = run("--rig", bad, *frames)
    assert res.returncode == 2 and "missing key 'rectification.P2'" in one_line(res.stderr)
    res = run("--rig", tmp_path / "absent.json", *frames)
    assert res.returncode == 2 and "does not exist" in one_line(res.stderr)


def test_images_of_another_size(rigs, tmp_path):
    waves, _, paths = rigs
    for side in ("left", "right"):
        (tmp_path / side).mkdir()
        for i, f in enumerate(sorted((waves / "waves" / side).glob("*.png"))[:2]):
            small = cv2.resize(cv2.imread(str(f), cv2.IMREAD_UNCHANGED), (256, 192), interpolation=cv2.INTER_AREA)
            cv2.imwrite(str(tmp_path / side / f"frame_{i}.png"), small)
    res = run("--rig", paths["waves"], "--left", tmp_path / "left", "--right", tmp_path / "right")
    assert res.returncode == 2
    assert one_line(res.stderr) == ("surfrec: error: left images: frame_0.png is 256x192 px but the rig expects "
                                    "512x384 px")


def test_unequal_counts_no_images_and_bad_options(rigs, tmp_path):
    waves, _, paths = rigs
    left = waves / "waves" / "left"
    five = str(waves / "waves" / "right" / "frame_0000[0-4].png")
    res = run("--rig", paths["waves"], "--left", left, "--right", five)
    assert res.returncode == 2
    assert one_line(res.stderr) == ("surfrec: error: left images: 6 frames but right images: 5 frames; "
                                    "frames are paired by index")
    (tmp_path / "empty").mkdir()
    res = run("--rig", paths["waves"], "--left", tmp_path / "empty", "--right", left)
    assert res.returncode == 2 and "holds no image files" in one_line(res.stderr)
    res = run("--rig", paths["waves"], "--left", str(tmp_path / "none-*.png"), "--right", left)
    assert res.returncode == 2 and "no files match" in one_line(res.stderr)
    res = run("--rig", paths["waves"], "--left", left, "--right", left, "--tolerance", "0")
    assert res.returncode == 2 and "--tolerance" in one_line(res.stderr)
    res = run("--rig", paths["waves"], "--left", "-", "--right", "-")
    assert res.returncode == 2 and "standard input" in one_line(res.stderr)
    res = run("--left", left, "--right", left)
    assert res.returncode == 2 and "--rig" in one_line(res.stderr)

"""`surfrec datum` as a user calls it: exit codes, messages, the file it writes.

Exit statuses and message forms are fixed by docs/conventions.md ("Exit status",
"Command line"); the accuracy references are the synthetic truth (the true
still-water plane z = 0 seen by the exact cameras of a `surfrec synth --quick`
session) and the targets of issue 4.
"""

import subprocess
import sys

import cv2
import numpy as np
import pytest

from surfrec.geometry.datum import datum_frame
from surfrec.io.datumfile import read_datum
from surfrec.io.rigfile import file_sha256, write_rig
from surfrec.io.truthfile import read_truth
from surfrec.synth.cameras import Camera


def run(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "surfrec.cli.main", "datum", *map(str, args)],
                          capture_output=True, text=True, cwd=cwd)


def one_line(stderr):
    lines = [line for line in stderr.splitlines() if line.strip()]
    assert len(lines) == 1, stderr
    return lines[0]


@pytest.fixture(scope="module")
def session(quick_session, make_true_rig, tmp_path_factory):
    out = quick_session("waves")
    d = tmp_path_factory.mktemp("datum-cli")
    rig = d / "rig.json"
    write_rig(make_true_rig(out / "truth.h5"), rig)
    return out, rig, d


@pytest.fixture(scope="module")
def made(session):
    # One run as a user would write it, with a tank frame.
    out, rig, d = session
    path = d / "datum.h5"
    res = run("--rig", rig, "--left", out / "still" / "left", "--right", out / "still" / "right", "-o", path,
              "--origin=-10,5", "--rotate", "30", "-q")
    return res, path


def test_makes_a_datum_that_meets_the_targets(session, made):
    out, rig, _ = session
    res, path = made
    assert res.returncode == 0, res.stderr
    assert res.stderr == ""  # -q: nothing but warnings, and there are none on still water
    text = res.stdout
    assert "plane-fit RMS:" in text and "still-water residual" in text and "noise floor" in text
    assert text.splitlines()[-1] == f"wrote {path}"
    dm = read_datum(path)
    left = Camera.from_dict(read_truth(out / "truth.h5")["rigs"]["rig"]["left"])
    n = left.rotation @ np.array([0.0, 0.0, 1.0])  # the world's up axis, in the left camera frame
    assert np.degrees(np.arccos(min(1.0, dm.plane_normal @ n))) < 0.05
    assert abs(dm.plane_offset - n @ left.translation) < 0.2
    assert dm.rig_sha256 == file_sha256(rig) and dm.n_frames == 3
    # The file holds the final tank frame: the convention frame moved to (-10, 5) and turned by 30 deg.
    np.testing.assert_allclose(dm.world_to_left_camera,
                               datum_frame(dm.plane_normal, dm.plane_offset, origin=(-10, 5), rotate_deg=30),
                               atol=1e-9)
    assert dm.attrs["origin_mm"] == [-10.0, 5.0] and dm.attrs["rotate_deg"] == 30.0
    # Parameters that `match` reuses, and the numbers the report states.
    assert dm.attrs["spacing_px"] == 4 and dm.attrs["window_px"] % 2 == 1
    assert np.all(np.diff(dm.u) == 4) and dm.u[0] == dm.attrs["window_px"] // 2 + 4
    assert f"plane-fit RMS: {dm.fit_rms_mm:.4f} mm" in text
    assert f"median {np.nanmedian(dm.noise_floor):.4f} mm" in text


def test_never_overwrites_without_force(session, made):
    out, rig, _ = session
    _, path = made
    before = path.read_bytes()
    res = run("--rig", rig, "--left", out / "still" / "left", "--right", out / "still" / "right", "-o", path)
    assert res.returncode == 2
    assert one_line(res.stderr) == f"surfrec: error: output {path} already exists; use --force to replace it"
    assert path.read_bytes() == before


def _pngs(folder, n, size, value=None, seed=0):
    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    for i in range(n):
        img = np.full(size[::-1], value, np.uint8) if value is not None else \
            rng.integers(0, 255, size[::-1], dtype=np.uint8)
        cv2.imwrite(str(folder / f"frame_{i:05d}.png"), img)
    return folder


def test_frames_of_another_size(session, tmp_path):
    _, rig, _ = session
    left = _pngs(tmp_path / "l", 2, (320, 240))
    right = _pngs(tmp_path / "r", 2, (320, 240))
    res = run("--rig", rig, "--left", left, "--right", right, "-o", tmp_path / "d.h5")
    assert res.returncode == 2
    line = one_line(res.stderr)
    assert "320x240" in line and "512x384" in line
    assert not (tmp_path / "d.h5").exists()


def test_unequal_frame_counts(session, tmp_path):
    out, rig, _ = session
    left = sorted((out / "still" / "left").glob("*.png"))
    right = sorted((out / "still" / "right").glob("*.png"))
    (tmp_path / "l.txt").write_text("\n".join(map(str, left)) + "\n")
    (tmp_path / "r.txt").write_text("\n".join(map(str, right[:2])) + "\n")
    res = run("--rig", rig, "--left", "@l.txt", "--right", "@r.txt", "-o", "d.h5", cwd=tmp_path)
    assert res.returncode == 2
    assert one_line(res.stderr) == ("surfrec: error: left images: 3 frames but right images: 2 frames; "
                                    "frames are paired by index")


def test_corrupt_rig(session, tmp_path):
    out, _, _ = session
    bad = tmp_path / "rig.json"
    bad.write_text('{"format": "surfrec.rig", "version": 1, ')
    res = run("--rig", bad, "--left", out / "still" / "left", "--right", out / "still" / "right", "-o",
              tmp_path / "d.h5")
    assert res.returncode == 2
    assert one_line(res.stderr).startswith(f"surfrec: error: rig file {bad} is not valid JSON")


def test_too_few_valid_points_and_atomic_output(session, made, tmp_path):
    # Frames without any pattern (projector off): nothing to match. An existing output given with
    # --force survives the failure untouched, and no partial file is left beside it.
    _, rig, _ = session
    left = _pngs(tmp_path / "l", 2, (512, 384), value=90)
    right = _pngs(tmp_path / "r", 2, (512, 384), value=90)
    target = tmp_path / "out" / "datum.h5"
    target.parent.mkdir()
    target.write_bytes(made[1].read_bytes())
    res = run("--rig", rig, "--left", left, "--right", right, "-o", target, "--force", "-q")
    assert res.returncode == 2
    line = one_line(res.stderr)
    assert line.startswith("surfrec: error: still frames") and "no disparity field found" in line
    assert target.read_bytes() == made[1].read_bytes()
    assert [p.name for p in target.parent.iterdir()] == ["datum.h5"]


@pytest.mark.parametrize("args, fragment", [
    (["--origin", "1,2,3"], "expected X,Y in mm"),
    (["--origin", "a,b"], "expected X,Y in mm"),
    (["--window", "16"], "must be an odd whole number"),
    (["--spacing", "0"], "--spacing"),
    (["--rotate", "nan"], "must be a finite number"),
])
def test_bad_options(session, tmp_path, args, fragment):
    out, rig, _ = session
    res = run("--rig", rig, "--left", out / "still" / "left", "--right", out / "still" / "right", "-o",
              tmp_path / "d.h5", *args)
    assert res.returncode == 2
    assert fragment in one_line(res.stderr)


def test_warns_when_the_water_was_not_still(session, tmp_path):
    # Two frames of the wave run (a 1 mm wave over a 3 mm dip) given as still water.
    out, rig, _ = session
    left = sorted((out / "waves" / "left").glob("*.png"))[:2]
    right = sorted((out / "waves" / "right").glob("*.png"))[:2]
    (tmp_path / "l.txt").write_text("\n".join(map(str, left)) + "\n")
    (tmp_path / "r.txt").write_text("\n".join(map(str, right)) + "\n")
    res = run("--rig", rig, "--left", "@l.txt", "--right", "@r.txt", "-o", "d.h5", "-q", cwd=tmp_path)
    assert res.returncode == 0, res.stderr
    assert "warning:" in res.stderr and "was the water still" in res.stderr
    assert (tmp_path / "d.h5").exists()


def test_help_lists_the_options():
    res = run("--help")
    assert res.returncode == 0
    for opt in ("--rig", "--left", "--right", "--output", "--origin", "--rotate", "--window", "--spacing",
                "--force", "--verbose", "--quiet"):
        assert opt in res.stdout

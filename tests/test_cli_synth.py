"""`surfrec synth` and `surfrec inspect` as a user calls them: exit codes, messages, outputs."""

import json
import subprocess
import sys

import h5py
import numpy as np
import pytest
from surfrec.io.images import open_frames


@pytest.fixture(scope="module")
def session(tmp_path_factory):
    out = tmp_path_factory.mktemp("synth") / "session"
    res = subprocess.run([sys.executable, "-m", "surfrec.cli.main", "synth", str(out), "--quick", "--seed", "5"],
                         capture_output=True, text=True)
    assert res.returncode == 0, res.stderr
    return out, res


def test_quick_session_layout(session):
    # Layout fixed by docs/synthetic-sessions.md.
    out, res = session
    assert res.stdout.strip() == str(out)
    for group, n in (("target", 16), ("still", 3), ("waves", 6)):
        left = open_frames(str(out / group / "left"))
        right = open_frames(str(out / group / "right"))
        assert len(left) == len(right) == n
        assert left.size == (512, 384)
    lines = (out / "waves" / "timestamps.csv").read_text().splitlines()
    assert lines[0] == "frame,left_s,right_s"
    assert len(lines) == 1 + 6
    t = np.array([float(l.split(",")[1]) for l in lines[1:]])
    np.testing.assert_allclose(np.diff(t), 1 / 500.0, rtol=1e-9)  # 500 frames/s (docs/synthetic-sessions.md)
    text = (out / "SCENARIO.md").read_text()
    assert "surfrec calibrate" in text and "ripple tank" in text
    assert not list(out.parent.glob(".session.partial-*"))


def test_truth_file_holds_the_exact_surface(session):
    out, _ = session
    from surfrec.io.truthfile import read_truth, read_truth_surface
    from surfrec.synth.surfaces import surface_from_dict

    t = read_truth(out / "truth.h5")
    assert t["format"] == "surfrec.truth" and t["scenario"] == "waves"
    g = t["groups"]["waves"]
    surface = surface_from_dict(g["surface"])
    x, y, h = read_truth_surface(out / "truth.h5", "waves")
    xx, yy = np.meshgrid(x, y)
    for i, ti in enumerate(g["time"]):
        np.testing.assert_allclose(h[i], surface.height(xx, yy, ti), atol=1e-5)
    # The amplitude step of the waves scenario: 1.0 mm then 1.1 mm (docs/synthetic-sessions.md).
    assert np.nanmax(h[-1] - surface.height(xx, yy, g["time"][-1])) < 1e-5
    tg = t["groups"]["target"]
    assert tg["corners_left"].shape == (16, 88, 2)


def test_inspect_truth_text_and_json(session):
    out, _ = session
    res = subprocess.run([sys.executable, "-m", "surfrec.cli.main", "inspect", str(out / "truth.h5"), "--json"],
                         capture_output=True, text=True)
    assert res.returncode == 0, res.stderr
    s = json.loads(res.stdout)
    assert s["format"] == "surfrec.truth"
    assert s["groups"]["waves"]["frames"] == 6
    # Baseline of the default rig: cameras at x = -125 and +125 mm (docs/synthetic-sessions.md: about 250 mm).
    assert 245 < s["rigs"]["rig"]["baseline_mm"] < 255
    assert s["groups"]["target"]["left_only"] >= 1 and s["groups"]["target"]["right_only"] >= 1
    res = subprocess.run([sys.executable, "-m", "surfrec.cli.main", "inspect", str(out / "truth.h5")],
                         capture_output=True, text=True)
    assert res.returncode == 0 and "baseline_mm" in res.stdout


def test_refuses_to_overwrite_without_force(session):
    out, _ = session
    res = subprocess.run([sys.executable, "-m", "surfrec.cli.main", "synth", str(out), "--quick"],
                         capture_output=True, text=True)
    assert res.returncode == 2
    assert "already exists" in res.stderr and "--force" in res.stderr
    assert res.stderr.count("\n") == 1 and "Traceback" not in res.stderr


@pytest.mark.parametrize("args, message", [
    (["synth", "{tmp}/x", "--scenario", "nope"], "Invalid value for '--scenario'"),
    (["synth", "{tmp}/no/such/folder/x", "--quick"], "does not exist"),
    (["synth", "{tmp}/x", "--seed", "-3"], "--seed"),
    (["inspect", "{tmp}/missing.h5"], "no such file"),
    (["inspect", "{tmp}/garbage.h5"], "not a file that surfrec writes"),
    (["inspect", "{tmp}/other.h5"], "without a surfrec 'format' attribute"),
    (["synth"], "Missing argument"),
    (["nocommand"], "No such command"),
])
def test_bad_input_gives_one_line_and_status_2(tmp_path, args, message):
    (tmp_path / "garbage.h5").write_bytes(b"not an hdf5 file at all")
    with h5py.File(tmp_path / "other.h5", "w") as f:
        f["x"] = 1
    argv = [a.format(tmp=tmp_path) for a in args]
    res = subprocess.run([sys.executable, "-m", "surfrec.cli.main", *argv], capture_output=True, text=True)
    assert res.returncode == 2, res.stderr
    assert message in res.stderr
    assert res.stderr.count("\n") == 1 and "Traceback" not in res.stderr


def test_version_and_help():
    from surfrec import __version__
    res = subprocess.run([sys.executable, "-m", "surfrec.cli.main", "--version"], capture_output=True, text=True)
    assert res.returncode == 0 and res.stdout.strip() == f"surfrec {__version__}"
    res = subprocess.run([sys.executable, "-m", "surfrec.cli.main", "--help"], capture_output=True, text=True)
    assert res.returncode == 0 and "synth" in res.stdout and "inspect" in res.stdout


def test_verbose_shows_traceback(tmp_path):
    res = subprocess.run([sys.executable, "-m", "surfrec.cli.main", "inspect", str(tmp_path / "missing.h5"), "-v"],
                         capture_output=True, text=True)
    assert res.returncode != 0 and "Traceback" in res.stderr

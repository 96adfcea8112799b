"""Shared fixtures: quick synthetic sessions rendered once per test run, and true rigs built from their truth."""

import subprocess
import sys

import pytest


@pytest.fixture(scope="session")
def quick_session(tmp_path_factory):
    """``get(scenario="waves", seed=0)`` -> folder of a ``surfrec synth --quick`` session.

    Each (scenario, seed) is rendered once per test run (about 10 s each)
    and shared by every test module that asks for it.
    """
    cache = {}

    def get(scenario="waves", seed=0):
        key = (scenario, seed)
        if key not in cache:
            out = tmp_path_factory.mktemp(f"synth-{scenario}-{seed}") / "session"
            res = subprocess.run([sys.executable, "-m", "surfrec.cli.main", "synth", str(out), "--quick",
                                  "--scenario", scenario, "--seed", str(seed), "-q"],
                                 capture_output=True, text=True)
            assert res.returncode == 0, res.stderr
            cache[key] = out
        return cache[key]

    return get


def true_rig(truth_path, rig_name="rig", *, alpha=0.0):
    """A StereoRig made from a synthetic session's exact cameras, without calibrating.

    Parameters
    ----------
    truth_path : the session's truth.h5.
    rig_name : which rig of the truth ("rig"; "moved" in the moved scenario).
    alpha : free scaling of the rectification (surfrec.calib.rectify.rectify).
    """
    from surfrec.calib.rectify import rectify
    from surfrec.io.rigfile import StereoRig
    from surfrec.io.truthfile import read_truth
    from surfrec.synth.cameras import Camera, stereo_from_cameras

    t = read_truth(truth_path)
    left = Camera.from_dict(t["rigs"][rig_name]["left"])
    right = Camera.from_dict(t["rigs"][rig_name]["right"])
    r, tr = stereo_from_cameras(left, right)
    rect = rectify(left.matrix, left.distortion, right.matrix, right.distortion, left.image_size, r, tr,
                   alpha=alpha)
    return StereoRig(image_size=left.image_size, left_matrix=left.matrix, left_distortion=left.distortion,
                     right_matrix=right.matrix, right_distortion=right.distortion, rotation=r, translation=tr,
                     rectification=rect, residuals={"rms_px": 0.0, "epipolar_rms_px": 0.0, "views": []},
                     board=None, extra={"note": "exact cameras of a synthetic session (test fixture)"})


@pytest.fixture(scope="session")
def make_true_rig():
    """The :func:`true_rig` helper, for test modules (conftest is not importable by name)."""
    return true_rig


def _reconstruct(session, work, rig_path):
    """datum, match and heights of a rendered session with the given rig; returns heights.h5."""
    def run(*args):
        res = subprocess.run([sys.executable, "-m", "surfrec.cli.main", *map(str, args), "-q"],
                             capture_output=True, text=True)
        assert res.returncode == 0, res.stderr

    s = session
    run("datum", "--rig", rig_path, "--left", s / "still" / "left", "--right", s / "still" / "right",
        "-o", work / "datum.h5")
    run("match", "--rig", rig_path, "--datum", work / "datum.h5", "--left", s / "waves" / "left", "--right",
        s / "waves" / "right", "--timestamps", s / "waves" / "timestamps.csv", "-o", work / "disparity.h5")
    run("heights", work / "disparity.h5", "--rig", rig_path, "--datum", work / "datum.h5", "-o",
        work / "heights.h5")
    return work / "heights.h5"


def _true_rig_heights(quick_session, tmp_path_factory, scenario):
    from surfrec.io.rigfile import write_rig

    s = quick_session(scenario)
    work = tmp_path_factory.mktemp(f"{scenario}-heights")
    rig = work / "rig.json"
    write_rig(true_rig(s / "truth.h5"), rig)
    return _reconstruct(s, work, rig), s


@pytest.fixture(scope="session")
def scatter_heights(quick_session, tmp_path_factory):
    """heights.h5 reconstructed from the rendered quick ``scatter`` session (datum, match, heights with the
    session's exact rig), and the session folder: ``(heights_path, session_path)``. Built once per run."""
    return _true_rig_heights(quick_session, tmp_path_factory, "scatter")


@pytest.fixture(scope="session")
def plane_heights(quick_session, tmp_path_factory):
    """The same for the rendered quick ``plane`` session: ``(heights_path, session_path)``. Built once per run."""
    return _true_rig_heights(quick_session, tmp_path_factory, "plane")

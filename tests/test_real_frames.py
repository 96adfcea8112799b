"""The chain on frames with real-camera nuisances: a quick session rendered with every camera effect.

The renderer's effects are checked against their formulas in tests/test_effects.py (vignetting
against cos^4 and its polynomial, shot noise against Poisson statistics / EMVA 1288, defocus
against the thin-lens blur circle ...), so the rendered frames, whose exact surface is known, can
carry accuracy checks. References here: the truth's list of hot and dead pixels, the exact surface
(surfrec assess --truth), and the same frames matched with the bad-pixel handling off (the
comparison a lab would make).
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from cli_run import run


@pytest.fixture(scope="module")
def session(tmp_path_factory, make_true_rig):
    from surfrec.io.rigfile import write_rig

    work = tmp_path_factory.mktemp("real-frames")
    s = work / "session"
    res = run("synth", s, "--quick", "--camera-effects", "all", "-q")
    assert res.returncode == 0, res.stderr
    rig = work / "rig.json"
    write_rig(make_true_rig(s / "truth.h5"), rig)
    res = run("datum", "--rig", rig, "--left", s / "still" / "left", "--right", s / "still" / "right",
              "-o", work / "datum.h5", "-q")
    assert res.returncode == 0, res.stderr
    out = {}
    for name, extra in (("robust", []), ("plain", ["--no-bad-pixels"])):
        d, h = work / f"disparity-{name}.h5", work / f"heights-{name}.h5"
        res = run("match", "--rig", rig, "--datum", work / "datum.h5", "--left", s / "waves" / "left",
                  "--right", s / "waves" / "right", "--timestamps", s / "waves" / "timestamps.csv",
                  "--shape-order", "2", "-o", d, "-q", *extra)
        assert res.returncode == 0, res.stderr
        res = run("heights", d, "--rig", rig, "--datum", work / "datum.h5", "-o", h, "-q")
        assert res.returncode == 0, res.stderr
        res = run("assess", h, "--truth", s / "truth.h5", "--json")
        assert res.returncode == 0, res.stderr
        out[name] = json.loads(res.stdout)
    return {"work": work, "session": s, "assess": out}


def test_datum_finds_the_hot_and_dead_pixels(session):
    # Against the truth's list of the pixels the renderer made hot (stuck or offset) or dead.
    from surfrec.io.datumfile import read_datum
    from surfrec.io.truthfile import read_truth_effects

    datum = read_datum(session["work"] / "datum.h5")
    fx = read_truth_effects(session["session"] / "truth.h5")
    for side in ("left", "right"):
        found = getattr(datum, f"defects_{side}")
        cam = fx["cameras"][side]
        truth = np.zeros(found.shape, bool)
        for key in ("hot_pixels", "dead_pixels"):
            rc = np.asarray(cam[key], int)
            truth[rc[:, 0], rc[:, 1]] = True
        # Offset hot pixels darker than 0.1 of full scale above their neighbours hide in the speckle.
        assert (found & truth).sum() >= 0.8 * truth.sum()
        assert (found & ~truth).sum() <= 0.2 * truth.sum()  # a few chance ones: each costs a 13 px mask


def test_bad_pixel_handling_holds_the_heights_together(session):
    # The same frames with the handling off are the comparison: far worse error and coverage.
    robust, plain = session["assess"]["robust"], session["assess"]["plain"]
    e_r, e_p = robust["true_datum_frame"]["rms_mm"], plain["true_datum_frame"]["rms_mm"]
    assert e_r < 0.5 * e_p
    assert robust["coverage"] > plain["coverage"] + 0.05
    assert robust["true_datum_frame"]["p95_abs_mm"] < 0.6 * plain["true_datum_frame"]["p95_abs_mm"]
    # The 10% amplitude step survives (truth: 1.1).
    assert robust["plane_wave"]["step_ratio"] == pytest.approx(1.1, abs=0.02)


def test_rejections_are_told_apart(session):
    import h5py

    with h5py.File(session["work"] / "disparity-robust.h5") as f:
        rejected = json.loads(f.attrs["rejected"])
        assert f.attrs["bad_pixels_saturation"] == pytest.approx(0.98)
    with h5py.File(session["work"] / "disparity-plain.h5") as f:
        plain = json.loads(f.attrs["rejected"])
    # Glints take whole windows: counted as bad pixels, not as failed or noisy matches.
    assert rejected["bad_pixels"] > 0 and plain["bad_pixels"] == 0
    assert rejected["not_converged"] < plain["not_converged"]

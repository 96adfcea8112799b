"""`surfrec assess` as a user calls it: the report against truth and without, exit codes and messages."""

import json
import math

import pytest

from synthetic_heights import write_exact_heights
from cli_run import run, run_here


@pytest.fixture(scope="module")
def files(quick_session, tmp_path_factory):
    truth = quick_session("waves") / "truth.h5"
    work = tmp_path_factory.mktemp("assess")
    write_exact_heights(truth, work / "exact.h5")
    write_exact_heights(truth, work / "noisy.h5", noise_mm=0.01, bias_mm=0.02, seed=3)
    write_exact_heights(truth, work / "lifted.h5", lift_mm=0.3)
    # The last three frames only, as `match --start 3` would give (time 0 = run frame 3).
    write_exact_heights(truth, work / "late.h5", frames=[3, 4, 5], attrs={"disparity_attributes":
                                                                            json.dumps({"frames": "3:6:1"})})
    return work, truth


def _json(*args):
    res = run_here("assess", *args, "--json")
    assert res.returncode == 0, res.stderr
    return json.loads(res.stdout)  # one JSON object on stdout (docs/conventions.md, --json)


def test_exact_heights_assess_as_exact(files):
    work, truth = files
    r = _json(work / "exact.h5", "--truth", truth)
    # Reference: the analytic truth surface the file was written from (float32 storage only).
    for g in ("true_geometry", "true_datum_frame"):
        assert r[g]["rms_mm"] < 1e-6 and r[g]["p95_abs_mm"] < 1e-6
    assert r["coverage"] == 1.0 and r["valid_outside_seen"] == 0
    # The waves scenario's step: 1.0 mm, then 1.1 mm from frame 3 (docs/synthetic-sessions.md; truth notes).
    pw = r["plane_wave"]
    assert pw["step_ratio"] == pytest.approx(1.1, abs=1e-6) and pw["frames_before_step"] == 3
    assert [round(a, 6) for a in pw["amplitudes_mm"]] == [1.0, 1.0, 1.0, 1.1, 1.1, 1.1]
    assert all(t["met"] for t in r["targets"].values())


def test_known_noise_and_bias_are_recovered(files):
    work, truth = files
    r = _json(work / "noisy.h5", "--truth", truth)
    for g in ("true_geometry", "true_datum_frame"):
        # Reference: the errors added by the fixture, E[e^2] = sigma^2 + bias^2.
        assert r[g]["bias_mm"] == pytest.approx(0.02, abs=5e-4)
        assert r[g]["rms_mm"] == pytest.approx(math.hypot(0.01, 0.02), rel=0.02)
        assert r[g]["random_rms_mm"] == pytest.approx(0.01, rel=0.05)
    assert r["predicted_sigma_median_mm"] == pytest.approx(0.01)
    assert r["plane_wave"]["step_ratio"] == pytest.approx(1.1, abs=2e-3)


def test_the_two_geometries_differ_by_a_datum_error(files):
    work, truth = files
    r = _json(work / "lifted.h5", "--truth", truth)
    # Reference: the fixture's datum sits 0.3 mm above the true still water, heights exact in it.
    assert r["true_geometry"]["rms_mm"] < 1e-6
    assert r["true_datum_frame"]["bias_mm"] == pytest.approx(-0.3, abs=1e-6)


def test_a_later_start_is_put_on_the_truth_clock(files):
    work, truth = files
    r = _json(work / "late.h5", "--truth", truth)
    assert r["truth"]["first_frame_index"] == 3 and r["truth"]["time_offset_s"] == pytest.approx(0.006)
    assert r["true_datum_frame"]["rms_mm"] < 1e-6


def test_text_report_and_no_truth(files):
    work, truth = files
    res = run("assess", work / "noisy.h5", "--truth", truth)
    assert res.returncode == 0, res.stderr
    out = res.stdout
    for text in ("true geometry", "true datum frame", "coverage: 100.00%", "ratio 1.10", "noise floor from the data",
                 "targets of issue 5"):
        assert text in out, text
    r = _json(work / "noisy.h5")
    assert "truth" not in r and r["noise_floor"]["order"] == 3 and r["noise_floor"]["sigma_mm"] > 0


def test_bad_input_one_line_status_2(files, quick_session):
    work, truth = files
    cases = [
        ([truth], "not a surfrec heights file"),
        ([work / "none.h5"], "does not exist"),
        ([work / "exact.h5", "--truth", work / "noisy.h5"], "not a surfrec truth file"),
        ([work / "exact.h5", "--truth", truth, "--group", "nope"], "has no frame group 'nope'"),
        ([work / "exact.h5", "--truth", truth, "--group", "target"], "holds target views"),
        ([work / "exact.h5", "--truth", truth, "--group", "still"], "not the session these heights come from"),
        ([work / "exact.h5", "--lag", 0], "--lag"),
    ]
    for k, (args, message) in enumerate(cases):
        res = (run if k == 0 else run_here)("assess", *args)
        assert res.returncode == 2, (args, res.stderr)
        assert message in res.stderr, (args, res.stderr)
        assert res.stderr.count("\n") == 1 and "Traceback" not in res.stderr

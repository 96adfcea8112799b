"""`surfrec preview` as a user calls it: the PNG, exit codes and messages (docs/conventions.md error policy)."""


import cv2
import numpy as np
import pytest

from synthetic_heights import write_exact_heights
from cli_run import run, run_here


@pytest.fixture(scope="module")
def heights(quick_session, tmp_path_factory):
    truth = quick_session("waves") / "truth.h5"
    work = tmp_path_factory.mktemp("preview")
    blank = np.zeros((73, 97), bool)
    blank[60:, 80:] = True  # a corner without data, drawn hatched
    write_exact_heights(truth, work / "heights.h5", noise_mm=0.01, blank=blank)
    return work, truth


def test_map_and_series_pngs(heights):
    work, _ = heights
    res = run("preview", work / "heights.h5", "-o", work / "map.png", "--frame", 3)
    assert res.returncode == 0, res.stderr
    assert res.stdout.strip() == f"wrote {work / 'map.png'}"
    one = cv2.imread(str(work / "map.png"))  # reference reader: OpenCV's PNG decoder
    assert one is not None and one.shape[0] > 500 and one.std() > 20
    res = run("preview", work / "heights.h5", "-o", work / "series.png", "--point=40,-30")
    assert res.returncode == 0, res.stderr
    two = cv2.imread(str(work / "series.png"))
    assert two.shape[1] > 1.4 * one.shape[1]  # a second panel beside the map
    # The map's colours: orange crests and blue troughs both present (BGR: orange has R > B, blue B > R).
    b, r = one[..., 0].astype(int), one[..., 2].astype(int)
    assert np.mean(r - b > 80) > 0.05 and np.mean(b - r > 80) > 0.05
    assert not list(work.glob(".*partial*"))


def test_refuses_to_overwrite_without_force(heights):
    work, _ = heights
    out = work / "keep.png"
    out.write_bytes(b"keep me")
    res = run("preview", work / "heights.h5", "-o", out)
    assert res.returncode == 2 and "already exists" in res.stderr and "--force" in res.stderr
    assert out.read_bytes() == b"keep me"
    res = run_here("preview", work / "heights.h5", "-o", out, "--force", "--limit", 5)
    assert res.returncode == 0 and cv2.imread(str(out)) is not None


def test_bad_input_one_line_status_2(heights):
    work, truth = heights
    h = work / "heights.h5"
    cases = [
        (["--frame", 6], "--frame 6 is out of range: "),
        (["--frame", -1], "--frame -1 is out of range"),
        (["--point", "400,0"], "point (400, 0) mm lies outside the grid (x -120 to 120 mm, y -90 to 90 mm)"),
        (["--point", "4;0"], "expected X,Y in mm"),
        (["--limit", 0], "must be a positive number of mm"),
    ]
    for k, (extra, message) in enumerate(cases):
        res = (run if k == 0 else run_here)("preview", h, "-o", work / "bad.png", *extra)
        assert res.returncode == 2, (extra, res.stderr)
        assert message in res.stderr, (extra, res.stderr)
        assert res.stderr.count("\n") == 1 and "Traceback" not in res.stderr
    for path, message in ((truth, "not a surfrec heights file"), (work / "none.h5", "does not exist")):
        res = run_here("preview", path, "-o", work / "bad.png")
        assert res.returncode == 2 and message in res.stderr, res.stderr
        assert res.stderr.count("\n") == 1
    res = run_here("preview", h, "-o", work / "bad.jpg")
    assert res.returncode == 2 and "must be a .png file" in res.stderr
    assert not (work / "bad.png").exists() and not (work / "bad.jpg").exists()

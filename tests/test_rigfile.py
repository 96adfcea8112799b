"""rig.json reading, validation and atomic writing (surfrec.io.rigfile).

Reference: the rig.json contract of docs/file-formats.md ("format": "surfrec.rig",
version 1; loading validates shapes and finiteness and names the offending
key; writing is atomic). Valid rectifications come from cv2.stereoRectify.
"""

import copy
import json
import math

import numpy as np
import pytest

from surfrec.calib.rectify import rectify
from surfrec.errors import InputError
from surfrec.io.rigfile import StereoRig, check_image_size, file_sha256, read_rig, rig_from_dict, write_rig


@pytest.fixture
def rig():
    k = np.array([[1280.0, 0.0, 258.0], [0.0, 1280.5, 190.0], [0.0, 0.0, 1.0]])
    d = np.array([-0.12, 0.26, 2e-4, -1e-4, -0.3])
    ang = math.radians(16.0)
    r = np.array([[math.cos(ang), 0.0, -math.sin(ang)], [0.0, 1.0, 0.0], [math.sin(ang), 0.0, math.cos(ang)]])
    t = np.array([-248.0, -3.9, 30.9])
    rect = rectify(k, d, k, d, (512, 384), r, t)
    return StereoRig(image_size=(512, 384), left_matrix=k, left_distortion=d, right_matrix=k.copy(),
                     right_distortion=d.copy(), rotation=r, translation=t, rectification=rect,
                     residuals={"rms_px": 0.04, "epipolar_rms_px": 0.03, "views": [{"name": "a", "rms_px": 0.04,
                                                                                   "used": True}]},
                     board={"kind": "chessboard", "cols": 11, "rows": 8, "square_mm": 15.0},
                     extra={"calibration": {"baseline_mm": 250.0}})


def test_round_trip(rig, tmp_path):
    path = tmp_path / "rig.json"
    write_rig(rig, path)
    back = read_rig(path)
    assert back.image_size == (512, 384)
    for name in ("left_matrix", "left_distortion", "right_matrix", "right_distortion", "rotation", "translation"):
        np.testing.assert_array_equal(getattr(back, name), getattr(rig, name))
    for key in ("R1", "R2", "P1", "P2", "Q"):
        np.testing.assert_array_equal(back.rectification[key], rig.rectification[key])
    assert back.residuals["rms_px"] == 0.04 and back.board["cols"] == 11
    assert back.extra["calibration"]["baseline_mm"] == 250.0
    d = json.loads(path.read_text())
    assert d["format"] == "surfrec.rig" and d["version"] == 1 and d["created"] and d["software"].startswith("surfrec")
    assert len(file_sha256(path)) == 64
    assert back.baseline_mm == pytest.approx(np.linalg.norm(rig.translation))


def test_write_is_atomic(rig, tmp_path):
    # A failure while writing leaves the old file as it was and no partial file behind.
    path = tmp_path / "rig.json"
    write_rig(rig, path)
    before = path.read_bytes()
    bad = copy.copy(rig)
    bad.residuals = {"rms_px": object()}  # not JSON-serialisable
    with pytest.raises(TypeError):
        write_rig(bad, path)
    assert path.read_bytes() == before
    assert [p.name for p in tmp_path.iterdir()] == ["rig.json"]


def _set(d, dotted, value):
    node = d
    parts = dotted.split(".")
    for p in parts[:-1]:
        node = node[p]
    if value is KeyError:
        del node[parts[-1]]
    else:
        node[parts[-1]] = value


NOT_ROTATION = [[1.0, 0.1, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]]
MIRROR = [[-1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]]

CORRUPTIONS = [
    ("format", "surfrec.datum", "'format'"),
    ("version", 2, "'version'"),
    ("version", True, "'version'"),
    ("image_size", [512], "'image_size' has shape"),
    ("image_size", [512.5, 384], "'image_size' must be two positive whole numbers"),
    ("cameras.left.matrix", KeyError, "missing key 'cameras.left.matrix'"),
    ("cameras.right.distortion", [0.1, 0.2, 0.0, 0.0], "'cameras.right.distortion' has shape"),
    ("cameras.left.distortion", [float("nan"), 0, 0, 0, 0], "'cameras.left.distortion' holds NaN"),
    ("cameras.left.matrix", [[0, 0, 1], [0, 1, 1], [0, 0, 1]], "'cameras.left.matrix' is not a camera matrix"),
    ("cameras.left.matrix", "eye", "'cameras.left.matrix' must be numbers"),
    ("stereo.rotation", NOT_ROTATION, "'stereo.rotation' is not a rotation matrix"),
    ("stereo.rotation", MIRROR, "'stereo.rotation' is not a rotation matrix"),
    ("stereo.translation", [0, 0, 0], "'stereo.translation' is zero"),
    ("stereo.translation", [1, 2, float("inf")], "'stereo.translation' holds NaN or infinite"),
    ("rectification.Q", KeyError, "missing key 'rectification.Q'"),
    ("rectification.R2", NOT_ROTATION, "'rectification.R2' is not a rotation matrix"),
    ("rectification.P1", [[0, 0, 0, 0], [0, 1, 0, 0], [0, 0, 1, 0]], "'rectification.P1' is not a rectified"),
    ("residuals", [], "'residuals' must be an object"),
    ("residuals.rms_px", -1, "'residuals.rms_px' must be a non-negative number"),
    ("residuals.views", {}, "'residuals.views' must be a list"),
    ("board.kind", "dartboard", "'board.kind'"),
    ("board.cols", 1, "'board.cols'"),
    ("board.square_mm", 0, "'board.square_mm'"),
]


@pytest.mark.parametrize("key,value,message", CORRUPTIONS, ids=[f"{c[0]}={c[1]!r}"[:40] for c in CORRUPTIONS])
def test_corrupt_rig_names_the_key(rig, tmp_path, key, value, message):
    d = json.loads(json.dumps(rig.to_dict()))
    _set(d, key, value)
    path = tmp_path / "rig.json"
    # json.dumps writes NaN / Infinity, which Python's reader accepts: finiteness is checked after parsing.
    path.write_text(json.dumps(d))
    with pytest.raises(InputError) as exc:
        read_rig(path)
    assert message in str(exc.value)
    assert str(path) in str(exc.value)
    assert "\n" not in str(exc.value)


@pytest.mark.parametrize("text,message", [("", "not valid JSON"), ("{\"format\": ", "not valid JSON"),
                                          ("[1, 2]", "expected a JSON object"), ("\xff\xfe", "")])
def test_unreadable_files(tmp_path, text, message):
    path = tmp_path / "rig.json"
    if text == "\xff\xfe":
        path.write_bytes(b"\xff\xfe\x00")
        message = "cannot be read"
    else:
        path.write_text(text)
    with pytest.raises(InputError, match=message):
        read_rig(path)
    with pytest.raises(InputError, match="does not exist"):
        read_rig(tmp_path / "missing.json")
    with pytest.raises(InputError, match="cannot be read"):
        read_rig(tmp_path)


def test_image_size_must_match(rig):
    check_image_size(rig, (512, 384))
    with pytest.raises(InputError, match="left images are 640x480 px but the rig was calibrated for 512x384 px"):
        check_image_size(rig, (640, 480), "left images")


def test_rig_from_dict_accepts_a_rig_without_board(rig):
    d = rig.to_dict()
    d["board"] = None
    assert rig_from_dict(d).board is None

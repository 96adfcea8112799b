"""Rendering a whole session: determinism across worker counts, truth records."""

import numpy as np

from surfrec.synth.scenarios import build_scenario
from surfrec.synth.session import frame_count, render_session


def _tiny(name="waves"):
    sc = build_scenario(name, quick=True, seed=2)
    for g in sc.groups:
        if g.kind == "board":
            g.views = g.views[:1]
        else:
            g.times = g.times[:1]
    return sc


def test_parallel_rendering_gives_the_same_images():
    # Same seed, same images, whatever the number of worker processes (design: reproducible sessions).
    out = {}
    for workers in (1, 2):
        frames = {}
        render_session(_tiny(), lambda g, i, l, r: frames.__setitem__((g, i), (l, r)), workers=workers)
        out[workers] = frames
    assert out[1].keys() == out[2].keys()
    for key in out[1]:
        for a, b in zip(out[1][key], out[2][key]):
            np.testing.assert_array_equal(a, b)


def test_left_and_right_see_the_same_pattern_but_their_own_noise():
    sc = _tiny()
    frames = {}
    rec = render_session(sc, lambda g, i, l, r: frames.__setitem__((g, i), (l, r)))
    left, right = frames[("still", 0)]
    assert left.dtype == np.uint8 and left.shape == (384, 512)
    assert not np.array_equal(left, right)
    assert frame_count(sc) == len(frames)
    assert rec["target"]["corners_left"].shape == (1, 88, 2)


def test_moved_scenario_turns_the_right_camera_by_0p2_degrees():
    # docs/synthetic-sessions.md: the right camera turned 0.2 degrees about its optical axis, centre fixed.
    sc = build_scenario("moved", quick=True, seed=0)
    a, b = sc.rigs["rig"].right, sc.rigs["moved"].right
    rel = b.rotation.T @ a.rotation  # the turn in world coordinates
    angle = np.degrees(np.arccos((np.trace(rel) - 1) / 2))
    assert abs(angle - 0.2) < 1e-9
    axis = np.array([rel[2, 1] - rel[1, 2], rel[0, 2] - rel[2, 0], rel[1, 0] - rel[0, 1]])
    axis /= np.linalg.norm(axis)
    assert abs(abs(axis @ a.rotation[2]) - 1) < 1e-9  # about the optical axis
    np.testing.assert_allclose(a.centre, b.centre, atol=1e-9)
    assert [g.name for g in sc.groups] == ["target", "target-moved", "still", "waves"]
    assert len(sc.group("target-moved").views) == 4

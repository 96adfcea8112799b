"""Slots, pairing by time, dropped frames and chunks (surfrec.batch.plan)."""

import numpy as np
import pytest

from surfrec.batch.plan import chunk_ranges, slots_by_index, slots_by_time
from surfrec.match.pipeline import FLAG_DROPPED

PERIOD = 0.002  # 500 frames/s, the default synthetic session's rate


def test_in_step_cameras_pair_one_to_one():
    t = np.arange(10) * PERIOD
    s = slots_by_time(t, t + 1e-6)
    assert len(s) == 10 and not s.flags.any()
    np.testing.assert_array_equal(s.left, np.arange(10))
    np.testing.assert_array_equal(s.right, np.arange(10))
    np.testing.assert_allclose(s.time, t)


def test_one_camera_dropping_a_frame_does_not_shift_later_pairs():
    t = np.arange(10) * PERIOD
    right = np.delete(t, 4)                      # the right camera missed frame 4
    s = slots_by_time(t, right)
    assert len(s) == 10
    assert s.flags[4] == FLAG_DROPPED and s.right[4] == -1 and s.left[4] == 4
    # Every later left frame keeps its true partner (by index on the right: one less).
    np.testing.assert_array_equal(s.right[5:], np.arange(4, 9))
    assert "1 dropped frame" in s.describe_drops() and "right camera" in s.describe_drops()


def test_gap_in_both_cameras_becomes_flagged_slots_never_bridged():
    t = np.delete(np.arange(12) * PERIOD, [5, 6, 7])   # 3 frame times missing in both cameras
    s = slots_by_time(t, t)
    assert len(s) == 12
    np.testing.assert_array_equal(np.flatnonzero(s.flags), [5, 6, 7])
    np.testing.assert_allclose(s.time[5:8], np.array([5, 6, 7]) * PERIOD)
    seg = s.segment
    assert seg[4] != seg[8]                          # time windows cannot reach across
    assert "3 dropped frames" in s.describe_drops() and "slot 5" in s.describe_drops()


def test_gap_threshold_is_one_and_a_half_periods():
    t = np.array([0, 1, 2, 3.4, 4.4]) * PERIOD      # a late frame (1.4 periods), not a drop
    assert not slots_by_time(t, t).flags.any()


def test_unsynchronised_cameras_are_an_error():
    t = np.arange(6) * PERIOD
    with pytest.raises(ValueError, match="not synchronised"):
        slots_by_time(t, t + 0.3 * PERIOD)


def test_huge_gap_refused_without_allocating():
    with pytest.raises(ValueError, match="above the limit"):
        t = np.array([0.0, PERIOD, 2 * PERIOD, 1e9])
        slots_by_time(t, t)


def test_chunks_cover_every_slot_once():
    for n, k in ((1, 5), (10, 3), (64, 64), (65, 64)):
        r = chunk_ranges(n, k)
        assert r[0][0] == 0 and r[-1][1] == n
        assert all(a < b <= a + k for a, b in r) and all(r[i][1] == r[i + 1][0] for i in range(len(r) - 1))
    s = slots_by_index(4, 500.0)
    np.testing.assert_allclose(s.time, np.arange(4) * PERIOD)

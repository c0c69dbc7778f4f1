"""The window schedule, checked against hand-worked examples."""

import numpy as np

from detector.windows import enumerate_windows, window_times


def test_windows_inside_regions_on_the_20ms_grid():
    # Region 0.0-1.0 s = frames 0..50. Duration 0.4 s = 20 frames, hop 0.2 s = 10 frames:
    # starts 0, 10, 20, 30 (30 + 20 = 50 fits; 40 + 20 = 60 does not).
    starts, kinds = enumerate_windows([(0.0, 1.0)], [(0.4, 0.2)], n_frames=1000)
    assert starts.tolist() == [0, 10, 20, 30] and kinds.tolist() == [0, 0, 0, 0]
    s, e = window_times(starts, kinds, [(0.4, 0.2)])
    np.testing.assert_allclose(s, [0.0, 0.2, 0.4, 0.6])
    np.testing.assert_allclose(e, [0.4, 0.6, 0.8, 1.0])


def test_two_durations_and_two_regions():
    sched = [(0.2, 0.1), (0.6, 0.3)]
    starts, kinds = enumerate_windows([(1.0, 1.4), (3.0, 3.6)], sched, n_frames=1000)
    # 0.2 s windows: region 1 starts at frames 50, 55, 60; region 2 at 150, 155, ..., 170.
    # 0.6 s windows: region 1 is 0.4 s long, under 3/4 of 0.6 s: none; region 2 holds exactly one at 150.
    got = sorted(zip(kinds.tolist(), starts.tolist()))
    assert got == [(0, 50), (0, 55), (0, 60), (0, 150), (0, 155), (0, 160), (0, 165), (0, 170), (1, 150)]


def test_windows_stop_at_the_end_of_the_signal():
    starts, kinds = enumerate_windows([(0.0, 5.0)], [(0.4, 0.2)], n_frames=30)
    assert starts.max() + 20 <= 30

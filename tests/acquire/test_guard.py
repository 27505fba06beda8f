"""The input guard: non-finite samples held out of every filter, full-scale samples counted."""

import numpy as np
import scipy.signal as ss

from livefilt.acquire.guard import InputGuard, resolution_limit


def test_nonfinite_samples_hold_the_last_finite_value_and_leave_the_input_alone():
    g = InputGuard([-1, -1], [1, 1], interval=4)
    x = np.array([[0.1, 0.0], [np.nan, 0.0], [np.inf, 0.2], [0.3, np.nan]], np.float32)
    y = g.check(x, 0)
    assert np.isnan(x[1, 0])  # the acquired block (what is recorded) is untouched
    np.testing.assert_array_equal(y, np.array([[0.1, 0], [0.1, 0], [0.1, 0.2], [0.3, 0.2]], np.float32))
    assert g.counts() == {"nonfinite_samples": 3, "clipped_samples": 0}
    # the next block starts after a bad first sample: the previous block's last value is held
    y2 = g.check(np.array([[np.nan, -np.inf]], np.float32), 4)
    np.testing.assert_array_equal(y2, np.array([[0.3, 0.2]], np.float32))


def test_a_filter_behind_the_guard_recovers_at_once():
    # scipy.signal.sosfilt as reference: the guarded stream equals filtering the held signal
    rng = np.random.default_rng(0)
    x = rng.standard_normal((4800, 1)).astype(np.float32) * 0.1
    x[960:970] = np.nan
    x[975] = np.inf
    g = InputGuard([-1], [1], interval=240)
    y = np.concatenate([g.check(x[k:k + 256], k) for k in range(0, 4800, 256)])
    sos = ss.butter(4, [1200, 1550], "bandpass", fs=48000, output="sos")
    out = ss.sosfilt(sos, y[:, 0].astype(float))
    assert np.all(np.isfinite(out))
    held = x[:, 0].copy()
    held[960:970] = held[959]
    held[975] = held[974]
    np.testing.assert_array_equal(y[:, 0], held)


def test_clipping_is_counted_and_rows_are_flagged_in_their_interval():
    g = InputGuard([-1.0], [1.0 - 2 ** -15], interval=10)
    x = np.zeros((40, 1), np.float32)
    x[12] = 1.0          # at full scale
    x[13] = -5.0         # beyond
    x[25] = np.nan
    g.check(x[:20], 0)
    nf, cl = g.row_flags(0, np.array([10, 20]))
    assert list(cl) == [0, 2] and list(nf) == [0, 0]
    g.check(x[20:], 20)
    nf, cl = g.row_flags(0, np.array([30, 40]))
    assert list(cl) == [0, 0] and list(nf) == [1, 0]
    assert g.counts() == {"nonfinite_samples": 1, "clipped_samples": 2}


def test_int16_top_code_counts_as_full_scale():
    # 32767/32768 is as far as int16 goes; an unguarded 1.0 threshold would miss the positive rail
    g = InputGuard([-1.0], [1 - 2 ** -15], interval=10)
    g.check(np.array([[32767 / 32768]], np.float32), 0)
    assert g.counts()["clipped_samples"] == 1


def test_resolution_limit_uses_one_step():
    # 8-bit: step 2/256 = 7.8125 mFS; IEEE Std 1241 ideal SINAD 6.02*8 + 1.76 = 49.92 dB
    note = resolution_limit(8, 1.0, "FS", 101.5e-6)
    assert "8-bit, one step is 7.812 mFS" in note and "49.9 dB" in note
    assert resolution_limit(16, 1.0, "FS", 78.46e-6) is None  # above 30.5 µFS

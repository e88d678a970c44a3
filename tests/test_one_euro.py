"""One Euro filter (Casiez, Roussel & Vogel, CHI 2012) and the zero-phase batch smoother."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from rigcast.runtime.schema import Control, ControlSchema
from rigcast.runtime.solve.one_euro import (
    FilterError,
    OneEuroConstants,
    OneEuroFilter,
    OneEuroParams,
    one_euro_step,
    one_euro_step_naive,
    zero_phase_smooth,
)
from scipy.signal import filtfilt

MS = 1_000_000  # ns per millisecond


def test_matches_paper_formulas_by_hand() -> None:
    # Casiez et al. 2012: alpha(te, fc) = 1 / (1 + tau/te), tau = 1/(2 pi fc);
    # dx = (x - x̂_prev)/te; dx̂ = alpha(te, dcut) dx + (1 - alpha) dx̂_prev;
    # fc = mincutoff + beta |dx̂|; x̂ = alpha(te, fc) x + (1 - alpha) x̂_prev.
    # mincutoff = 1 Hz, beta = 0.5, dcutoff = 1 Hz; samples (t, x) = (0, 0) (0.1, 1) (0.2, 1)
    # (0.35, 2), worked out on paper (values to 6 significant figures):
    #   step 0: first sample passes through: x̂ = 0, dx̂ = 0.
    #   step 1: te = 0.1; tau_d = 1/(2 pi) = 0.159155; alpha_d = 1/(1 + 1.59155) = 0.385870
    #           dx = (1 - 0)/0.1 = 10;  dx̂ = 0.385870 * 10 = 3.85870
    #           fc = 1 + 0.5 * 3.85870 = 2.92935; tau = 0.0543312
    #           alpha = 1/(1 + 0.543312) = 0.647957
    #           x̂ = 0.647957 * 1 + 0.352043 * 0 = 0.647957
    #   step 2: te = 0.1; alpha_d = 0.385870
    #           dx = (1 - 0.647957)/0.1 = 3.52043
    #           dx̂ = 0.385870*3.52043 + 0.614130*3.85870 = 3.72817
    #           fc = 1 + 0.5 * 3.72817 = 2.86408; alpha = 1/(1 + 0.555692) = 0.642801
    #           x̂ = 0.642801 * 1 + 0.357199 * 0.647957 = 0.874251
    #   step 3: te = 0.15; alpha_d = 1/(1 + 0.159155/0.15) = 0.485194
    #           dx = (2 - 0.874251)/0.15 = 7.50500
    #           dx̂ = 0.485194*7.50500 + 0.514806*3.72817 = 5.56066
    #           fc = 1 + 0.5 * 5.56066 = 3.78033; alpha = 1/(1 + 0.280672) = 0.780840
    #           x̂ = 0.780840 * 2 + 0.219160 * 0.874251 = 1.75328
    params = OneEuroParams.uniform(1, min_cutoff=1.0, beta=0.5, d_cutoff=1.0)
    expected = [0.0, 0.647957, 0.874251, 1.75328]
    expected_dx = [0.0, 3.85870, 3.72817, 5.56066]
    state = None
    for (t_ms, x), want, want_dx in zip(
        [(0, 0.0), (100, 1.0), (200, 1.0), (350, 2.0)], expected, expected_dx, strict=True
    ):
        y, state = one_euro_step_naive(state, np.array([x]), t_ms * MS, params)
        assert y[0] == pytest.approx(want, abs=2e-6)
        assert state.dx_prev[0] == pytest.approx(want_dx, abs=2e-5)
    # The product's step (live and batch) against the same hand-worked values.
    consts = OneEuroConstants.of(params)
    fast = None
    for (t_ms, x), want, want_dx in zip(
        [(0, 0.0), (100, 1.0), (200, 1.0), (350, 2.0)], expected, expected_dx, strict=True
    ):
        y, fast = one_euro_step(fast, np.array([x]), t_ms * MS, consts)
        assert y[0] == pytest.approx(want, abs=2e-6)
        assert fast.dx_prev[0] == pytest.approx(want_dx, abs=2e-5)


@settings(max_examples=40, deadline=None)
@given(seed=st.integers(min_value=0, max_value=2**32 - 1), steps=st.integers(2, 40))
def test_fast_and_naive_agree(seed: int, steps: int) -> None:
    # The product's step against the per-control loop, with per-control parameters,
    # irregular intervals, repeated timestamps (te = 0 holds the output) and steps back.
    rng = np.random.default_rng(seed)
    c = 7
    params = OneEuroParams(rng.uniform(0.1, 5.0, c), rng.uniform(0.0, 3.0, c),
                           rng.uniform(0.1, 5.0, c))
    consts = OneEuroConstants.of(params)
    fast = naive = None
    t = 0
    for _ in range(steps):
        t += int(rng.choice([0, -1, 1, 8, 30])) * MS
        x = rng.normal(size=c).astype(np.float32)
        y_fast, fast = one_euro_step(fast, x, t, consts)
        y_naive, naive = one_euro_step_naive(naive, x, t, params)
        np.testing.assert_allclose(y_fast, y_naive, rtol=1e-10, atol=1e-12)
        np.testing.assert_allclose(fast.dx_prev, naive.dx_prev, rtol=1e-9, atol=1e-9)
        assert fast.t_prev_ns == naive.t_prev_ns


def test_a_run_in_chunks_equals_the_filter_frame_by_frame() -> None:
    """OneEuroFilter.run (the batch solve) over chunks, state carried, against the filter called
    one frame at a time (the live server), across a stream gap, with per-control parameters."""
    rng = np.random.default_rng(5)
    t, c = 400, 6
    times = np.cumsum(rng.uniform(1 / 90, 1 / 45, t))  # irregular spacing
    times[250:] += 0.4  # a gap longer than gap_ns: both restart there
    t_ns = np.round(times * 1e9).astype(np.int64)
    x = np.cumsum(rng.normal(scale=0.05, size=(t, c)), axis=0)
    params = OneEuroParams(rng.uniform(0.5, 3.0, c), rng.uniform(0.0, 2.0, c),
                           rng.uniform(0.5, 2.0, c))
    live = OneEuroFilter(params, gap_ns=250_000_000)
    ref = np.array([live(x[i], int(t_ns[i]), i) for i in range(t)])
    batch = OneEuroFilter(params, gap_ns=250_000_000)
    parts, flags = [], []
    for i0 in range(0, t, 37):
        y, filtered = batch.run(x[i0 : i0 + 37], t_ns[i0 : i0 + 37], np.arange(i0, min(t, i0 + 37)))
        parts.append(y)
        flags.append(filtered)
    np.testing.assert_array_equal(np.concatenate(parts), ref)
    assert live.resets == batch.resets == 1
    np.testing.assert_array_equal(np.concatenate(parts)[250], x[250])  # restarted: passes through
    assert list(np.flatnonzero(~np.concatenate(flags))) == [0, 250]


def test_constant_input_stays_constant() -> None:
    f = OneEuroFilter(OneEuroParams.uniform(3, min_cutoff=0.5, beta=1.0))
    x = np.array([0.25, -1.0, 3.0])
    for i in range(50):
        np.testing.assert_array_equal(f(x, i * 8 * MS), x)


def test_beta_zero_is_an_exponential_smoother() -> None:
    # With beta = 0 the cutoff is fixed, so on a uniform 100 Hz grid alpha is constant:
    # y_i = alpha x_i + (1 - alpha) y_{i-1}, alpha = 1/(1 + 1/(2 pi fc te)).
    fc, te = 2.0, 0.01
    alpha = 1.0 / (1.0 + 1.0 / (2.0 * math.pi * fc * te))
    rng = np.random.default_rng(7)
    xs = rng.normal(size=(30, 2))
    f = OneEuroFilter(OneEuroParams.uniform(2, min_cutoff=fc, beta=0.0), gap_ns=None)
    ref = xs[0].copy()
    for i, x in enumerate(xs):
        y = f(x, i * 10 * MS)
        if i:
            ref = alpha * x + (1 - alpha) * ref
        np.testing.assert_allclose(y, ref, rtol=1e-12)


def test_higher_beta_lags_less_on_a_ramp() -> None:
    lags = []
    for beta in (0.0, 0.1, 1.0):
        f = OneEuroFilter(OneEuroParams.uniform(1, min_cutoff=1.0, beta=beta))
        for i in range(120):
            x = np.array([i * 0.05])
            y = f(x, i * 8 * MS)
        lags.append(float(x[0] - y[0]))
    assert lags[0] > lags[1] > lags[2] > 0


def test_beta_per_unit_range_filters_a_control_the_same_in_any_unit() -> None:
    """The same motion as a weight in 0..1 and as an angle in -40..40 degrees: with beta read per
    unit of range, the filtered angle is the filtered weight mapped to degrees."""
    lo, hi = np.array([0.0, -40.0]), np.array([1.0, 40.0])
    params = OneEuroParams.uniform(2, min_cutoff=1.0, beta=10.0).per_unit_range(hi - lo)
    np.testing.assert_allclose(params.beta, [10.0, 10.0 / 80.0])
    f = OneEuroFilter(params)
    rng = np.random.default_rng(5)
    u = np.clip(np.cumsum(rng.normal(0, 0.04, 200)) + 0.5, 0, 1)
    for i, ui in enumerate(u):
        y = f(np.array([ui, lo[1] + 80.0 * ui]), i * 16 * MS)
        assert y[1] == pytest.approx(lo[1] + 80.0 * y[0], abs=1e-9)
    with pytest.raises(FilterError, match="control ranges"):
        params.per_unit_range(np.array([1.0, 0.0]))


def test_resets_on_time_gap_and_frame_jump() -> None:
    f = OneEuroFilter(OneEuroParams.uniform(1, min_cutoff=0.1), gap_ns=100 * MS, max_frame_jump=5)
    f(np.array([0.0]), 0, frame=0)
    assert f(np.array([1.0]), 10 * MS, frame=1)[0] < 0.1 and f.filtered
    # Gap of 200 ms > 100 ms: the new sample passes through.
    assert f(np.array([5.0]), 210 * MS, frame=2)[0] == 5.0
    assert not f.filtered and f.resets == 1
    assert f(np.array([6.0]), 220 * MS, frame=3)[0] < 6.0
    # A small forward jump (dropped frames) does not reset; a big one does; so does going back.
    assert f(np.array([7.0]), 230 * MS, frame=6)[0] < 7.0
    assert f(np.array([9.0]), 240 * MS, frame=40)[0] == 9.0
    assert f(np.array([2.0]), 250 * MS, frame=3)[0] == 2.0
    assert f.resets == 3
    f.reset()
    assert f(np.array([4.0]), 260 * MS)[0] == 4.0


def test_repeat_timestamp_holds_output() -> None:
    params = OneEuroConstants.of(OneEuroParams.uniform(2))
    _, s = one_euro_step(None, np.array([0.0, 1.0]), 5 * MS, params)
    y1, s1 = one_euro_step(s, np.array([1.0, 2.0]), 15 * MS, params)
    y2, s2 = one_euro_step(s1, np.array([100.0, 100.0]), 15 * MS, params)  # te = 0
    y3, s3 = one_euro_step(s2, np.array([100.0, 100.0]), 14 * MS, params)  # te < 0
    np.testing.assert_array_equal(y2, y1)
    np.testing.assert_array_equal(y3, y1)
    assert s3.t_prev_ns == s1.t_prev_ns and np.all(np.isfinite(y3))  # the state is unchanged
    np.testing.assert_array_equal(s3.x_prev, s1.x_prev)
    np.testing.assert_array_equal(s3.dx_prev, s1.dx_prev)


def test_irregular_timestamps_follow_te() -> None:
    # The same jump smooths less after a long interval than after a short one.
    params = OneEuroConstants.of(OneEuroParams.uniform(1, min_cutoff=1.0))
    _, s = one_euro_step(None, np.array([0.0]), 0, params)
    short, _ = one_euro_step(s, np.array([1.0]), 2 * MS, params)
    long, _ = one_euro_step(s, np.array([1.0]), 50 * MS, params)
    assert 0 < short[0] < long[0] < 1


def test_passthrough() -> None:
    f = OneEuroFilter(OneEuroParams.uniform(2), passthrough=True)
    f(np.array([0.0, 0.0]), 0)
    np.testing.assert_array_equal(f(np.array([3.0, -2.0]), MS), [3.0, -2.0])
    assert not f.filtered


def test_per_group_params() -> None:
    schema = ControlSchema(
        (
            Control("brow_l", 0, 1, 0, group="brow"),
            Control("brow_r", 0, 1, 0, group="brow"),
            Control("jaw", 0, 1, 0, group="mouth"),
            Control("lip", 0, 1, 0, group="mouth"),
        )
    )
    p = OneEuroParams.per_group(
        schema, {"brow": (0.5, 0.1, 1.0), "lip": (3.0, 0.0, 2.0)}, default=(1.0, 0.2, 1.5)
    )
    np.testing.assert_array_equal(p.min_cutoff, [0.5, 0.5, 1.0, 3.0])
    np.testing.assert_array_equal(p.beta, [0.1, 0.1, 0.2, 0.0])
    np.testing.assert_array_equal(p.d_cutoff, [1.0, 1.0, 1.5, 2.0])
    with pytest.raises(FilterError, match="eyes"):
        OneEuroParams.per_group(schema, {"eyes": (1.0, 0.0, 1.0)})
    with pytest.raises(FilterError, match="min_cutoff"):
        OneEuroParams.uniform(2, min_cutoff=0.0)
    with pytest.raises(FilterError, match="shape"):
        one_euro_step(None, np.zeros(3), 0, OneEuroConstants.of(p))


def test_zero_phase_matches_scipy_filtfilt() -> None:
    # Reference: scipy.signal.filtfilt with b = [alpha], a = [1, alpha - 1] (the first-order
    # low pass y_i = alpha x_i + (1 - alpha) y_{i-1}); padtype=None so both start from the
    # steady state of the first sample.
    fs, fc = 120.0, 4.0
    alpha = 1.0 / (1.0 + 1.0 / (2.0 * math.pi * fc / fs))
    rng = np.random.default_rng(11)
    t = np.arange(300) / fs
    x = np.stack([np.sin(2 * np.pi * 1.5 * t), rng.normal(size=300)], axis=1)
    ours = zero_phase_smooth(x, t, fc)
    ref = filtfilt([alpha], [1.0, alpha - 1.0], x, axis=0, padtype=None)
    np.testing.assert_allclose(ours, ref, atol=1e-10)


def test_zero_phase_has_no_lag_on_a_symmetric_bump() -> None:
    t = np.sort(np.random.default_rng(2).uniform(0.0, 2.0, 400))
    t = np.concatenate([t, 4.0 - t[::-1]])  # irregular but mirror-symmetric about t = 2
    bump = np.exp(-((t - 2.0) ** 2) / 0.02)[:, None]
    smooth = zero_phase_smooth(bump, t, 3.0)
    assert smooth[:, 0].max() < 0.99
    peak = t[int(np.argmax(smooth[:, 0]))]
    assert abs(peak - 2.0) < 0.01
    causal = OneEuroFilter(OneEuroParams.uniform(1, min_cutoff=3.0), gap_ns=None)
    lagged = [causal(b, int(ti * 1e9))[0] for b, ti in zip(bump, t, strict=True)]
    assert t[int(np.argmax(lagged))] - 2.0 > 0.02  # the causal filter lags; this one does not

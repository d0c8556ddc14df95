"""The 1-euro filter against its published formulas (Casiez, Roussel & Vogel, CHI 2012) and scipy."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.signal import lfilter

from twistrate.clients.teleop.one_euro import OneEuroFilter, smoothing_factor


def _step(filt: OneEuroFilter, period: float, n: int) -> np.ndarray:
    """Start at rest (0) at t = 0, then a unit step on every axis from the next sample on."""
    filt(np.zeros(6), 0.0)
    return np.array([filt(np.ones(6), (i + 1) * period)[0] for i in range(n)])


def test_smoothing_factor_is_the_papers() -> None:
    # Casiez et al. 2012: alpha = 1 / (1 + tau / T_e), tau = 1 / (2 pi f_c).
    te, fc = 0.008, 1.5
    tau = 1.0 / (2 * math.pi * fc)
    assert smoothing_factor(te, fc) == pytest.approx(1.0 / (1.0 + tau / te))


def test_step_response_without_speed_term_is_first_order() -> None:
    # With beta = 0 the cutoff is fixed: X^_i = alpha X_i + (1 - alpha) X^_(i-1) (Casiez et al. 2012),
    # so the step response is 1 - (1 - alpha)^i. Reference: the same recursion as an IIR filter in
    # scipy.signal.lfilter (b = [alpha], a = [1, alpha - 1]) started from rest.
    te, fc = 1.0 / 125.0, 2.0
    alpha = 1.0 / (1.0 + 1.0 / (2 * math.pi * fc * te))
    got = _step(OneEuroFilter(fc, beta=0.0), te, 100)
    closed_form = 1.0 - (1.0 - alpha) ** np.arange(1, 101)
    reference = lfilter([alpha], [1.0, alpha - 1.0], np.ones(100))
    np.testing.assert_allclose(got, closed_form, rtol=1e-12)
    np.testing.assert_allclose(got, reference, rtol=1e-12)


def test_step_response_reaches_63_percent_at_the_time_constant() -> None:
    # A first-order low-pass with cutoff f_c has time constant tau = 1/(2 pi f_c) and reaches
    # 1 - 1/e of a step after tau (common practice); sampled fast (T_e << tau) the filter follows it.
    fc, te = 1.0, 1e-4
    tau = 1.0 / (2 * math.pi * fc)
    n = round(tau / te)
    got = _step(OneEuroFilter(fc, beta=0.0), te, n)
    assert got[-1] == pytest.approx(1 - math.exp(-1), abs=2e-3)


def test_first_samples_with_speed_term_follow_the_formulas() -> None:
    # By hand from the paper's formulas, the first two samples after a unit step from rest:
    #   dX_1 = (1 - 0)/T_e, dX^_1 = a_d dX_1 (previous derivative 0), f_c = f_cmin + beta |dX^_1|,
    #   X^_1 = a(f_c) * 1; then dX_2 = (1 - X^_1)/T_e, dX^_2 = dX^_1 + a_d (dX_2 - dX^_1), ...
    te, fcmin, beta, dcut = 0.01, 1.0, 0.7, 1.0

    def a(fc: float) -> float:
        return 1.0 / (1.0 + (1.0 / (2 * math.pi * fc)) / te)

    dx1 = a(dcut) * (1.0 / te)
    x1 = a(fcmin + beta * dx1)
    dx2 = dx1 + a(dcut) * ((1.0 - x1) / te - dx1)
    x2 = x1 + a(fcmin + beta * dx2) * (1.0 - x1)
    got = _step(OneEuroFilter(fcmin, beta, dcut), te, 2)
    np.testing.assert_allclose(got, [x1, x2], rtol=1e-12)


def test_speed_term_cuts_lag() -> None:
    # The point of the filter: a larger beta raises the cutoff on fast motion (Casiez et al. 2012).
    te = 1.0 / 125.0
    slow = _step(OneEuroFilter(1.0, beta=0.0), te, 20)
    fast = _step(OneEuroFilter(1.0, beta=1.0), te, 20)
    assert np.all(fast > slow)
    assert np.all(np.diff(fast) >= 0) and fast[-1] <= 1.0


def test_irregular_and_repeated_time_stamps() -> None:
    filt = OneEuroFilter(1.0, 0.5)
    filt(np.zeros(6), 0.0)
    a = filt(np.ones(6), 0.01)
    b = filt(np.full(6, 5.0), 0.01)  # same time stamp: no division by zero, previous output kept
    np.testing.assert_array_equal(a, b)
    c = filt(np.ones(6), 0.05)
    assert np.all(np.isfinite(c)) and np.all(c > a)


def test_axes_are_independent() -> None:
    filt = OneEuroFilter(1.0, 1.0)
    filt(np.zeros(6), 0.0)
    out = filt(np.array([1.0, 0, 0, 0, 0, 0]), 0.01)
    assert out[0] > 0 and not out[1:].any()

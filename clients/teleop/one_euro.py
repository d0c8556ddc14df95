"""The 1-euro filter for hand input: a first-order low-pass whose cutoff rises with speed.

Casiez, Roussel and Vogel, "1 Euro Filter: A Simple Speed-based Low-pass Filter for Noisy Input in
Interactive Systems", CHI 2012. With T_e the sampling period and X_i the i-th sample:

    tau = 1 / (2 pi f_c),    alpha = 1 / (1 + tau / T_e)                          (smoothing factor)
    X^_i = alpha X_i + (1 - alpha) X^_(i-1),   X^_1 = X_1                    (exponential smoothing)
    dX_i = (X_i - X^_(i-1)) / T_e,  filtered with a fixed cutoff d_cutoff into dX^_i
    f_c = f_cmin + beta |dX^_i|

Slow motion gets a low cutoff (jitter removed), fast motion a high one (lag removed). Here the filter
runs on six axes at once, each axis with its own cutoff; the sampling period is the time between two
calls, so irregular input (evdev sends only changes) is handled as the paper's formulas allow.
"""

from __future__ import annotations

import math

import numpy as np

#: A period shorter than this (two samples with the same time stamp) reuses the last output: the
#: formulas divide by T_e.
MIN_PERIOD_S = 1e-6


def smoothing_factor(period_s: float, cutoff_hz: np.ndarray | float) -> np.ndarray | float:
    """alpha = 1 / (1 + tau / T_e), tau = 1 / (2 pi f_c) (Casiez et al. 2012). period_s > 0, cutoff_hz > 0."""
    tau = 1.0 / (2.0 * math.pi * np.asarray(cutoff_hz, dtype=float))
    return 1.0 / (1.0 + tau / period_s)


class OneEuroFilter:
    """Six (or any m) independent 1-euro filters.

    min_cutoff_hz : f_cmin > 0, Hz. beta : speed coefficient >= 0, s (cutoff gain per unit of
    deflection speed; deflections are unitless). derivative_cutoff_hz : d_cutoff > 0, Hz (the paper
    uses 1 Hz). size : number of axes.
    """

    def __init__(self, min_cutoff_hz: float, beta: float, derivative_cutoff_hz: float = 1.0,
                 size: int = 6) -> None:
        self.min_cutoff_hz = float(min_cutoff_hz)
        self.beta = float(beta)
        self.derivative_cutoff_hz = float(derivative_cutoff_hz)
        self.size = size
        self.reset()

    def reset(self, value: np.ndarray | None = None, t_s: float | None = None) -> None:
        """Forget the history. With `value` (size,) at time t_s, start from it as the first sample."""
        self._x: np.ndarray | None = None if value is None else np.array(value, dtype=float)
        self._dx = np.zeros(self.size)
        self._t = t_s

    def __call__(self, x: np.ndarray, t_s: float) -> np.ndarray:
        """Filter sample x (size,) taken at t_s (s, monotonic). Returns the filtered (size,) array."""
        x = np.asarray(x, dtype=float)
        if self._x is None or self._t is None:
            self._x, self._t = x.copy(), t_s
            self._dx = np.zeros(self.size)
            return self._x.copy()
        period = t_s - self._t
        if period < MIN_PERIOD_S:
            return self._x.copy()
        dx = (x - self._x) / period
        self._dx = self._dx + smoothing_factor(period, self.derivative_cutoff_hz) * (dx - self._dx)
        cutoff = self.min_cutoff_hz + self.beta * np.abs(self._dx)
        alpha = smoothing_factor(period, cutoff)
        self._x = self._x + alpha * (x - self._x)
        self._t = t_s
        return self._x.copy()

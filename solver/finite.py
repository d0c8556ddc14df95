"""The finiteness tests of a tick's inputs: a fast sum-of-squares test, the exact element test only
when it fails, and the InputError naming the first bad field.

Nothing here may warn on a huge finite input: the values are scaled by SQUARE_SAFE before squaring,
so (1.8e308 * 2^-540)^2 * 9 stays finite, while nan and inf still propagate into the sums.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

import numpy as np

from twistrate.solver.errors import InputError, field_error

if TYPE_CHECKING:  # pragma: no cover - annotations only (resolve imports this module)
    from twistrate.solver.resolve import DesiredTwist

#: Factor applied before the sums of squares of the finiteness tests (module docstring).
SQUARE_SAFE = 2.0 ** -540
#: |x * SQUARE_SAFE|^2 of a twist of magnitude 1e150 (m/s, rad/s): above it a tick's products may
#: overflow (the solve then ends in its rest fallback), so it runs with overflow warnings silenced.
HUGE_SQ = (1e150 * SQUARE_SAFE) ** 2


def raise_non_finite(q: np.ndarray, qd_prev: np.ndarray, twist: DesiredTwist) -> None:
    """Raise InputError naming the first non-finite (or overflowing) input field."""
    for name, value in (("q", q), ("qd_prev", qd_prev), ("twist.linear", twist.linear),
                        ("twist.angular", twist.angular), ("twist.point", twist.point)):
        if not np.all(np.isfinite(value)):
            raise field_error(InputError, name, np.asarray(value).tolist(), "finite numbers only")
    raise field_error(InputError, "twist", (np.asarray(twist.linear).tolist(),
                                            np.asarray(twist.angular).tolist()),
                      "magnitudes whose base-frame conversion stays finite")


def check_states(q: np.ndarray, qd_prev: np.ndarray, twist: DesiredTwist) -> None:
    """Raise InputError for a non-finite q (n,) or qd_prev (n,) (the twist is tested in base frame
    by the caller, after its conversion)."""
    # Fast test: nan and inf propagate into the sums of squares; only then the exact element test runs.
    qs = q * SQUARE_SAFE
    ps = qd_prev * SQUARE_SAFE
    if not math.isfinite(qs.dot(qs) + ps.dot(ps)) and not (
            np.isfinite(q).all() and np.isfinite(qd_prev).all()):
        raise_non_finite(q, qd_prev, twist)

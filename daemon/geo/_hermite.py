"""Cubic Hermite interpolation weights, shared by the GLONASS node table and the orbit grid.

With s = (t − t_a)/h on [t_a, t_a + h] and the basis h00 = 2s³ − 3s² + 1, h10 = s³ − 2s² + s,
h01 = −2s³ + 3s², h11 = s³ − s² (common practice): p(t) = h00·p_a + h·h10·v_a + h01·p_b +
h·h11·v_b, and v(t) = dp/dt.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

__all__ = ["hermite_matrix"]


def hermite_matrix(h: float) -> npt.NDArray[np.float64]:
    """(4, 8): [1, s, s², s³] @ it → weights of (p_a, v_a, p_b, v_b) for the position (first 4)
    and the velocity (last 4)."""
    return np.array(
        [
            [1.0, 0.0, -3.0, 2.0],  # h00
            [0.0, h, -2.0 * h, h],  # h·h10
            [0.0, 0.0, 3.0, -2.0],  # h01
            [0.0, 0.0, -h, h],  # h·h11
            [0.0, -6.0 / h, 6.0 / h, 0.0],  # h00'/h
            [1.0, -4.0, 3.0, 0.0],  # h10'
            [0.0, 6.0 / h, -6.0 / h, 0.0],  # h01'/h
            [0.0, -2.0, 3.0, 0.0],  # h11'
        ]
    ).T.copy()

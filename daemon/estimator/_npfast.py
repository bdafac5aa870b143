"""Direct handles on the C functions behind two numpy calls of the per-epoch path.

``np.count_nonzero(a)`` (whole array) and ``np.einsum(...)`` (without ``optimize``) are Python
wrappers that hand their arguments to these C functions; calling them directly skips the wrapper and
the array-function dispatch (~2,000 instructions a call on the estimator's small arrays) and gives
the same results (tests/test_core_speed_oracle.py checks both against the public functions). numpy
1.x keeps them elsewhere: there the public functions are used.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

import numpy as np

if TYPE_CHECKING:
    import types
    from collections.abc import Callable

    import numpy.typing as npt

__all__ = ["count_nonzero", "einsum"]

_multiarray: types.ModuleType
try:
    from numpy._core import multiarray as _multiarray
except ImportError:  # numpy < 2
    _multiarray = np

#: ``np.count_nonzero`` of a whole array.
count_nonzero: Callable[[npt.ArrayLike], int] = getattr(
    _multiarray, "count_nonzero", np.count_nonzero
)
#: ``np.einsum`` without ``optimize``.
einsum: Callable[..., npt.NDArray[Any]] = getattr(_multiarray, "c_einsum", np.einsum)

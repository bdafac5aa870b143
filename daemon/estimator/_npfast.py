"""Direct handles on the C functions behind numpy calls of the per-epoch path.

``np.count_nonzero(a)`` (whole array) and ``np.einsum(...)`` (without ``optimize``) are Python
wrappers that hand their arguments to these C functions; calling them directly skips the wrapper and
the array-function dispatch (~2,000 instructions a call on the estimator's small arrays) and gives
the same results (tests/test_core_speed_oracle.py checks both against the public functions). numpy
1.x keeps them elsewhere: there the public functions are used.
"""

from __future__ import annotations

import warnings
from typing import TYPE_CHECKING, Any

import numpy as np

if TYPE_CHECKING:
    import types
    from collections.abc import Callable

    import numpy.typing as npt

__all__ = ["count_nonzero", "einsum", "quiet_enter", "quiet_exit"]

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

_QUIET = {"invalid": "ignore", "divide": "ignore", "over": "ignore"}
_var: Any = None
_make: Any = None
try:  # numpy 2's error state is a context variable holding an object made by _make_extobj
    from numpy._core.umath import _extobj_contextvar as _var
    from numpy._core.umath import _make_extobj as _make

    with warnings.catch_warnings():  # check these private names still behave so, once
        warnings.simplefilter("error")
        _token = _var.set(_make(**_QUIET))
        try:
            np.divide(np.ones(1), np.zeros(1))  # would warn (an error here) if not quiet
        finally:
            _var.reset(_token)
except Exception:  # numpy < 2, or changed internals: the public errstate below
    _var = _make = None
#: (the current error state it was derived from, the quiet state derived from it)
_quiet: tuple[object, object] = (object(), None)


def quiet_enter() -> object:
    """Enter ``np.errstate(invalid="ignore", divide="ignore", over="ignore")``; returns the token
    for :func:`quiet_exit` (call it in a ``finally``). With numpy 2 the quiet state is derived
    once per outer state and set directly (no errstate object to build and enter per call)."""
    global _quiet  # noqa: PLW0603 - the one-entry cache of the derived state
    if _var is None:
        ctx = np.errstate(**_QUIET)  # type: ignore[arg-type]
        ctx.__enter__()
        return ctx
    base = _var.get()
    q = _quiet
    if q[0] is not base:
        _quiet = q = (base, _make(**_QUIET))
    return _var.set(q[1])


def _errstate_exit(token: Any) -> None:
    token.__exit__(None, None, None)


#: Leave the state :func:`quiet_enter` entered (its token; call it in a ``finally``).
quiet_exit: Callable[[Any], object] = _errstate_exit if _var is None else _var.reset

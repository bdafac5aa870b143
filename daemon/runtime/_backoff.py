"""Capped, jittered exponential backoff as a pure generator (STYLE rule 16).

The generator never sleeps and never reads a clock: the reconnect loop asks it for the next delay,
logs it, and waits on the event loop's clock. Tests drive it with a seeded ``random.Random``.
"""

from __future__ import annotations

import random
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from collections.abc import Iterator

__all__ = ["BACKOFF_CAP_S", "BACKOFF_INITIAL_S", "backoff_delays", "max_delay_s"]

#: First reconnect delay (s): short enough that a brief cable wobble costs about a second.
BACKOFF_INITIAL_S = 1.0
#: Ceiling of any single delay (s): a long outage is retried at least twice a minute.
BACKOFF_CAP_S = 30.0


def backoff_delays(
    *,
    initial_s: float = BACKOFF_INITIAL_S,
    cap_s: float = BACKOFF_CAP_S,
    factor: float = 2.0,
    jitter: float = 0.2,
    rng: random.Random | None = None,
) -> Iterator[float]:
    """Yield delays ``min(cap, initial·factorⁿ)`` each scaled by a uniform factor in ``[1−jitter, 1]``.

    Jitter only shortens a delay, so every value lies in ``(0, cap_s]`` and many stations that lost
    the same caster at once spread their reconnects instead of arriving together.
    """
    if not (initial_s > 0 and cap_s >= initial_s and factor >= 1.0 and 0.0 <= jitter < 1.0):
        raise ValueError(
            f"backoff: need 0 < initial_s <= cap_s, factor >= 1, 0 <= jitter < 1; got "
            f"initial_s={initial_s}, cap_s={cap_s}, factor={factor}, jitter={jitter}"
        )
    rand = rng if rng is not None else random.Random()  # noqa: S311 - jitter, not cryptography
    base = initial_s
    while True:
        yield base * (1.0 - jitter * rand.random())
        base = min(cap_s, base * factor)


def max_delay_s(
    attempt: int,
    *,
    initial_s: float = BACKOFF_INITIAL_S,
    cap_s: float = BACKOFF_CAP_S,
    factor: float = 2.0,
) -> float:
    """Upper bound of the delay before reconnect attempt ``attempt`` (0-based), without jitter."""
    return min(cap_s, initial_s * factor ** max(0, attempt))

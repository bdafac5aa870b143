"""Built-in benchmarks behind ``ionwarden bench`` (filled as the pipeline stages land)."""

from __future__ import annotations

__all__ = ["run_benchmarks"]


def run_benchmarks(*, seconds: float) -> int:
    """Run every available benchmark for about ``seconds`` each; print one line per figure."""
    print(f"ionwarden bench: no benchmarks in this build yet (budget {seconds:g} s each)")
    return 0

"""Small parts of a run: chunk planning, in-order folding, adaptive stopping.

Chunking and arrival order never change a run's result: realisation ``i``
only draws from its own random stream, and results are folded strictly in
realisation order. Adaptive stopping decides at exact multiples of its check
interval, so where a run stops does not depend on the chunking either.
"""

from __future__ import annotations

import math
from collections.abc import Iterator
from dataclasses import dataclass

from ..errors import OptionError

__all__ = ["chunk_size", "chunks", "InOrder", "StopRule"]


def chunk_size(start: int, stop: int, *, workers: int, checkpoint_every: int,
               check_every: int | None = None) -> int:
    """Realisations per task: about four tasks per worker, at most 25 and at
    most ``checkpoint_every``; with adaptive stopping a divisor of the check
    interval (and of the resume offset within it)."""
    size = max(1, min(checkpoint_every, math.ceil(max(stop - start, 1) / (4 * workers)), 25))
    if check_every is not None:
        size = math.gcd(size, check_every)
        if start % check_every:
            size = math.gcd(size, start % check_every)
    return size


def chunks(start: int, stop: int, size: int, taper: int = 0) -> Iterator[tuple[int, int]]:
    """The half-open ranges ``[a, b)`` covering ``[start, stop)``, made lazily.

    With ``taper`` (the number of workers) chunks shrink towards the end, each
    at most a ``2 * taper``-th of what is left, so the workers finish close
    together instead of one waiting for another's last full chunk.
    """
    a = start
    while a < stop:
        n = size if not taper else max(1, min(size, -(-(stop - a) // (2 * taper))))
        yield a, min(a + n, stop)
        a += n


class InOrder:
    """Holds results that arrive in any order; releases them in realisation order."""

    def __init__(self, start: int):
        self.next = start
        self._pending: dict[int, tuple] = {}

    def push(self, a: int, b: int, payload) -> Iterator[tuple[int, int, object]]:
        """Store chunk ``[a, b)``; yield every chunk now ready, in order."""
        self._pending[a] = (b, payload)
        while self.next in self._pending:
            a = self.next
            b, payload = self._pending.pop(a)
            self.next = b
            yield a, b, payload


@dataclass(frozen=True)
class StopRule:
    """Stop once the job's Monte Carlo standard error is below ``target``.

    Checked each time the realisation count crosses a multiple of ``every``,
    once at least ``minimum`` realisations are in.
    """

    target: float | None = None
    every: int = 20
    minimum: int = 20

    def __post_init__(self):
        if self.target is not None and not (math.isfinite(self.target) and self.target > 0):
            raise OptionError(f"{{target_se}} must be positive, got {self.target}", "target_se")

    @property
    def active(self) -> bool:
        return self.target is not None

    def met(self, before: int, acc) -> bool:
        """True when folding took the count from ``before`` past a check point
        and the accumulator's statistic is below the target."""
        if not self.active or acc.n < self.minimum or acc.n // self.every <= before // self.every:
            return False
        stat = acc.stop_statistic()
        return bool(stat < self.target)

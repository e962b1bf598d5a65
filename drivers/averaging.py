"""``[detector] reads_per_step``: several reads per step, averaged, spread kept."""
from __future__ import annotations

import math

from drivers.base import Reading


class AveragingDetector:
    """Wraps any detector; ``read()`` returns the mean of ``n`` inner reads.

    ``spread`` is the sample standard deviation (n - 1 in the denominator) of
    the individual reads, not of their mean; auxiliary channels are averaged
    key by key over the reads that carried them.
    """

    def __init__(self, inner, n: int):
        if n < 1:
            raise ValueError("reads_per_step must be at least 1")
        self.inner, self.n = inner, n
        self.name = inner.name

    def identify(self) -> str:
        return self.inner.identify()

    def read(self) -> Reading:
        reads = [self.inner.read() for _ in range(self.n)]
        values = [r.value for r in reads]
        mean = math.fsum(values) / self.n
        spread = 0.0
        if self.n > 1:
            spread = math.sqrt(math.fsum((v - mean) ** 2 for v in values) / (self.n - 1))
        aux: dict[str, float] = {}
        for key in {k for r in reads for k in r.aux}:
            got = [r.aux[key] for r in reads if key in r.aux]
            aux[key] = math.fsum(got) / len(got)
        return Reading(mean, spread, aux)

    def close(self) -> None:
        self.inner.close()

"""How figures are written for a person (dashboard, end-of-run table, report, mode list)."""
from __future__ import annotations

import math


def u_decimals(u: float) -> int:
    """Decimal places that give u two significant digits; the value is written to the same
    place (JCGM 100, the GUM, 7.2.6)."""
    return max(0, 1 - int(math.floor(math.log10(u))))


def no_negative_zero(x: float, decimals: int = 1) -> float:
    """x, or 0.0 when it would print as "-0.0" at this many decimals (a backlash of -0.002)."""
    return 0.0 if abs(x) < 0.5 * 10.0 ** -decimals else x

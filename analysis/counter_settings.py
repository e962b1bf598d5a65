"""The counter's rig keys ([counter]), their checks, and the block sizes both the
rig loader and the compiled loops need; no numpy, no compiled code, so reading a
rig file does not load the counter.
"""
from __future__ import annotations

import math
from typing import Any

BLOCK = 8            # samples per baseline block
NOISE_STRIDE = 4     # the noise level is estimated on every 4th sample (a divisor of BLOCK)
GROUP = 8192         # samples per noise update (a multiple of BLOCK)

# [counter] rig keys and their defaults (schema format of daq/rig.py).
SETTINGS: dict[str, Any] = {
    "hi_sigma": 5.0,          # trigger: baseline + hi_sigma * noise
    "lo_sigma": 2.0,          # re-arm: back below baseline + lo_sigma * noise
    "confirm_sigma": 3.0,     # the 3-point median must reach this too (spikes do not)
    "min_height": 0.0,        # absolute floor for the trigger, detector units (0 = none)
    "baseline_window": 512,   # samples; longer than the widest blip, shorter than drift
    "noise_window": 32768,    # samples the noise level is averaged over
    "merge_fraction": 0.5,    # structure closer than this fraction of the spacing is one mode
    "expected_spacing_steps": 0.0,  # 0 = learn the spacing from the first blips
}


def validate_settings(settings: dict) -> list[tuple[str, str]]:
    """(key, one-line message) for every value the counter cannot work with."""
    s = dict(SETTINGS)
    s.update(settings or {})
    out: list[tuple[str, str]] = []

    def num(key: str) -> float | None:
        v = s[key]
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
            out.append((key, f"must be a finite number, got {v!r}"))
            return None
        return float(v)

    hi, lo, conf = num("hi_sigma"), num("lo_sigma"), num("confirm_sigma")
    if lo is not None and lo < 0:
        out.append(("lo_sigma", f"must not be negative, got {lo}"))
    if hi is not None and lo is not None and lo >= hi:
        out.append(("lo_sigma", f"must be below hi_sigma ({lo} >= {hi}): the counter would never re-arm"))
    if conf is not None and conf <= 0:
        out.append(("confirm_sigma", f"must be positive, got {conf}"))
    mh = num("min_height")
    if mh is not None and mh < 0:
        out.append(("min_height", f"must not be negative, got {mh}"))
    for key, least in (("baseline_window", 3 * BLOCK), ("noise_window", GROUP)):
        v = s[key]
        if isinstance(v, bool) or not isinstance(v, int):
            out.append((key, f"must be an integer number of samples, got {v!r}"))
        elif v < least:
            out.append((key, f"must be at least {least} samples, got {v}"))
    mf = num("merge_fraction")
    if mf is not None and not 0.05 <= mf <= 0.9:
        out.append(("merge_fraction", f"must be between 0.05 and 0.9 of the spacing, got {mf}"))
    es = num("expected_spacing_steps")
    if es is not None and es < 0:
        out.append(("expected_spacing_steps", f"must not be negative (0 = learn it), got {es}"))
    return out

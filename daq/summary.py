"""The end-of-run summary: the live count plus the offline refinement of the log."""
from __future__ import annotations

import math
from typing import Any

from daq.runlog import RunLog

# Keys every summary carries, whether or not the rig is calibrated.
CORE_KEYS = ("modes", "crossings", "spacing_steps", "spacing_steps_u", "samples", "status", "log")
CALIBRATED_KEYS = ("spacing_nm", "spacing_nm_u", "wavelength_nm", "length_um", "length_um_u")


def json_ready(x: Any) -> Any:
    """JSON-safe: NaN/inf become None, numpy scalars become Python numbers."""
    if isinstance(x, dict):
        return {k: json_ready(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [json_ready(v) for v in x]
    if hasattr(x, "item") and not isinstance(x, (str, bytes)):
        x = x.item()
    if isinstance(x, float) and not math.isfinite(x):
        return None
    return x


def live_summary(log: RunLog, sections: dict, status: str, counter) -> dict:
    """The summary's keys from the counter alone (no offline pass over the log):
    for logs too big to refine, and when the offline pass was interrupted."""
    from analysis.physics import live_calibration
    est = counter.estimate()
    out = {"modes": counter.modes, "crossings": counter.crossings,
           "spacing_steps": est.get("spacing_steps"), "spacing_steps_u": est.get("spacing_steps_u"),
           "samples": log.n_samples, "status": status, "log": str(log.path)}
    cal = live_calibration(out["spacing_steps"], out["spacing_steps_u"], sections, est.get("centre_steps"))
    if cal:
        out.update({k: cal.get(k) for k in CALIBRATED_KEYS if k in cal})
    if est.get("backlash_steps") is not None:
        out["backlash_steps"] = est["backlash_steps"]
    out["live_spacing_steps"] = est.get("spacing_steps")
    out["refined"] = False
    ordered = {k: out[k] for k in CORE_KEYS + CALIBRATED_KEYS if k in out}
    ordered.update({k: v for k, v in out.items() if k not in ordered})
    return json_ready(ordered)


def analyze_log(log: RunLog, sections: dict) -> dict:
    """Offline analysis of every logged sample (analysis.pipeline)."""
    from analysis.pipeline import analyze_trace
    s = log.read_samples()
    if len(s) == 0:
        return {}
    return analyze_trace(s.position_steps, s.value, direction=s.direction, pass_index=s.pass_index,
                         sections=sections, counter_settings=sections.get("counter"))


def build_summary(log: RunLog, sections: dict, status: str, counter=None, bench=None,
                  reason: str = "") -> dict:
    result = analyze_log(log, sections)
    out: dict[str, Any] = dict(result)
    if counter is not None:
        # The live count is the product; the offline pass refines spacing and length.
        out["modes"], out["crossings"] = counter.modes, counter.crossings
        live = counter.estimate()
        out["live_spacing_steps"] = live.get("spacing_steps")
    out.setdefault("modes", 0)
    out.setdefault("crossings", 0)
    out.setdefault("spacing_steps", None)
    out.setdefault("spacing_steps_u", None)
    out["samples"] = log.n_samples
    out["status"] = status
    out["log"] = str(log.path)
    if reason:
        out["reason"] = reason
    from analysis.physics import Calibration
    if Calibration.from_sections(sections) is None:
        for k in CALIBRATED_KEYS:
            out.pop(k, None)
    if bench is not None:
        t = bench.truth()
        out["truth"] = {k: t.get(k) for k in ("modes", "spacing_steps", "spacing_nm", "length_um",
                                              "group_index", "wavelength_nm")}
    # Readers look for these first.
    ordered = {k: out[k] for k in CORE_KEYS + CALIBRATED_KEYS if k in out}
    ordered.update({k: v for k, v in out.items() if k not in ordered})
    return json_ready(ordered)

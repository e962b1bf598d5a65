"""The end-of-run summary: the live count plus the offline refinement of the log."""
from __future__ import annotations

import math
from typing import Any

from daq.numbers import no_negative_zero, u_decimals
from daq.runlog import RunLog

# Keys every summary carries, whether or not the rig is calibrated.
CORE_KEYS = ("modes", "crossings", "spacing_steps", "spacing_steps_u", "samples", "status", "log")
CALIBRATED_KEYS = ("spacing_nm", "spacing_nm_u", "wavelength_nm", "wavelength_nm_u", "spacing_ghz",
                   "spacing_ghz_u", "length_um", "length_um_u")


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
    cal = live_calibration(out["spacing_steps"], out["spacing_steps_u"], sections, est.get("centre_steps"),
                           est.get("backlash_steps"))
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


def _pm(v, u, digits: int | None = None) -> str:
    """v ± u with u to two significant figures and v to the same decimal place."""
    if v is None:
        return "…"
    if not u or not math.isfinite(u):
        return f"{v:.6g}"
    d = digits if digits is not None else u_decimals(abs(u))
    return f"{v:.{d}f} ± {u:.{d}f}"


def summary_rows(s: dict) -> list[tuple[str, str]]:
    """The end-of-run summary for a person: (label, value with units and ± u) rows; the
    full record is the JSON (--json) and the log."""
    status, reason = s.get("status", "?"), s.get("reason") or ""
    rows = [("status", reason if reason.startswith(status) else status + (f": {reason}" if reason else "")),
            ("modes counted", f"{s.get('modes', 0)}   ({s.get('crossings', 0)} blips seen)")]
    sp = s.get("spacing_steps")
    if sp is not None:
        k95, u = s.get("spacing_steps_k95"), s.get("spacing_steps_u")
        rows.append(("mode spacing", f"{_pm(sp, u)} steps"
                     + (f"   (95 %: ± {k95 * u:.2g} steps)" if k95 and u else "")))
    if s.get("spacing_nm") is not None:
        rows.append(("", f"{_pm(s['spacing_nm'], s.get('spacing_nm_u'))} nm   "
                         f"{_pm(s.get('spacing_ghz'), s.get('spacing_ghz_u'))} GHz"))
        rows.append(("wavelength", f"{_pm(s['wavelength_nm'], s.get('wavelength_nm_u'))} nm"))
    if s.get("length_um") is not None:
        top = (s.get("budget") or [{}])[0]
        share = ""
        if top.get("input"):       # the budget's shares are of the variance (u squared)
            share = f"   ({100 * top['share']:.0f} % of it from {top['input']})"
        rows.append(("chip length", f"{_pm(s['length_um'], s.get('length_um_u'))} µm{share}"))
    if s.get("backlash_steps") is not None:
        rows.append(("backlash", f"{no_negative_zero(s['backlash_steps']):.1f} steps"))
    rows.append(("samples", f"{s.get('samples', 0)}   log {s.get('log', '')}"))
    t = s.get("truth")
    if t:
        rows.append(("truth (sim)" if s.get("status") == "finished" else "truth (whole sweep)", ", ".join(
            f"{label} {t[k]:.6g}{unit}" for k, label, unit in (
                ("modes", "modes", ""), ("spacing_steps", "spacing", " steps"),
                ("length_um", "length", " µm"), ("group_index", "n_g", "")) if t.get(k) is not None)))
    return rows

"""The offline analysis of a whole trace: count, refine, calibrate, propagate uncertainty.

``analyze_trace`` is the one entry point the CLI, replay and reports call.
It runs the same streaming counter as a live run (so the count is the live
count), then works on the counter's mode table:
* spacing in steps = slope of mode centre against mode number (weighted
  least squares, with its standard error; analysis.counter.fit_spacing);
* a spectral cross-check of the period (Lomb-Scargle periodogram of each
  pass against position, scipy.signal.lombscargle);
* gaps in the mode numbering flagged as probable missed modes;
* per-pass counts and spacings;
* with a calibration: spacing in nm at the centre of the counted range,
  chip length, and their uncertainties by the GUM (JCGM 100) with a
  Monte Carlo check (JCGM 101) and a budget;
* without one: the by-count route, N modes over the counted span.
"""
from __future__ import annotations

import math
from typing import Any

import numpy as np

from analysis import physics
from analysis.counter import StreamCounter
from analysis.modefit import fit_spacing, mechanical_centres
from analysis.uncertainty import monte_carlo

FEED_CHUNK = 65536


def directions_from_positions(position_steps: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(direction, pass_index) from commanded positions in time order.

    A sample takes the direction of the move that brought the stage there;
    repeated positions keep the previous direction; a change of direction
    starts a new pass.
    """
    pos = np.asarray(position_steps, dtype=np.float64)
    n = pos.size
    if n == 0:
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    step = np.sign(np.diff(pos, prepend=pos[0]))
    nz = np.flatnonzero(step)
    if nz.size == 0:
        return np.ones(n, np.int64), np.zeros(n, np.int64)
    idx = np.zeros(n, np.int64)
    idx[nz] = nz
    np.maximum.accumulate(idx, out=idx)
    d = step[idx]
    d[: nz[0]] = step[nz[0]]           # before the first move: the first move's direction
    d = d.astype(np.int64)
    pass_index = np.concatenate([[0], np.cumsum(d[1:] != d[:-1])]).astype(np.int64)
    return d, pass_index


def count(position_steps, value, direction, counter_settings=None) -> StreamCounter:
    """Feed the whole trace through a fresh streaming counter, as a live run would."""
    c = StreamCounter(counter_settings)
    for a in range(0, value.size, FEED_CHUNK):
        c.feed(position_steps[a:a + FEED_CHUNK], direction[a:a + FEED_CHUNK], value[a:a + FEED_CHUNK])
    c.finish()
    return c


def spectral_period_steps(position_steps, value, pass_index, spacing_hint: float | None) -> float | None:
    """Dominant period of the blips against position (Lomb-Scargle, longest pass).

    The pass is first averaged onto a regular grid of positions (bins of
    1/8 of the spacing), which keeps it quick on long passes
    and on many reads per step. Searched between 0.5 and 2 times the
    counter's spacing, so the cross-check answers "is the period the counter
    found really in the data".
    """
    from scipy.signal import lombscargle
    if spacing_hint is None or value.size < 64:
        return None
    passes, counts = np.unique(pass_index, return_counts=True)
    sel = pass_index == passes[np.argmax(counts)]
    x = position_steps[sel].astype(float)
    y = value[sel].astype(float)
    if np.ptp(x) < 4 * spacing_hint:
        return None
    # the middle half of the pass: the spacing in steps changes along a wide sweep
    lo_x, hi_x = np.quantile(x, [0.25, 0.75])
    if hi_x - lo_x >= 8 * spacing_hint:
        mid = (x >= lo_x) & (x <= hi_x)
        x, y = x[mid], y[mid]
    width = max(spacing_hint / 8.0, np.ptp(x) / 4000.0)
    b = np.floor((x - x.min()) / width).astype(np.int64)
    cnt = np.bincount(b)
    have = cnt > 0
    xb = (np.bincount(b, weights=x)[have] / cnt[have])
    yb = (np.bincount(b, weights=y)[have] / cnt[have])
    yb -= yb.mean()
    # peaks are about spacing^2/span wide: a coarse grid at a third of that, then refined
    n_coarse = int(min(3000, max(200, 3 * 1.5 * np.ptp(x) / spacing_hint)))
    periods = np.linspace(0.5 * spacing_hint, 2.0 * spacing_hint, n_coarse)
    power = lombscargle(xb, yb, 2 * np.pi / periods)
    best = int(np.argmax(power))
    fine = np.linspace(periods[max(best - 2, 0)], periods[min(best + 2, periods.size - 1)], 200)
    pf = lombscargle(xb, yb, 2 * np.pi / fine)
    return float(fine[int(np.argmax(pf))])


def find_gaps(modes: np.ndarray) -> list[dict]:
    """Runs of mode numbers never seen between seen ones: probable missed modes."""
    out = []
    m = np.sort(modes)
    for a, b in zip(m[:-1], m[1:]):
        if b - a > 1:
            out.append({"after_mode": int(a), "missing": int(b - a - 1)})
    return out


def per_pass_results(ct: dict, pass_of_index: np.ndarray, fit: dict | None = None,
                     backlash: float | None = None, spacing_u: float | None = None) -> list[dict]:
    """Count and spacing of every pass, and how well it agrees with the whole map.

    Only trusted crossings (not the counter's weak ones: kick glimpses, cut
    tails) are used. Each pass's centres (backlash-corrected) are compared
    with the whole map's fit: ``offset_steps`` is their mean distance from
    it, ``spacing_steps`` the map's spacing plus the slope of that distance
    against mode number (so every pass is judged at the same centre), with
    its standard error. ``consistent`` (passes of 5 modes or more): the slope
    within 3 standard errors (or 0.5 %) of zero and the offset within a
    quarter spacing; a renumbered or drifting pass fails.
    """
    out = []
    if ct["index"].size == 0:
        return out
    p_of = pass_of_index[np.clip(ct["index"], 0, pass_of_index.size - 1)]
    strong = ~np.asarray(ct.get("weak", np.zeros(ct["index"].size, bool)), bool)
    coef = (fit or {}).get("coef")
    for p in np.unique(p_of):
        allp = p_of == p
        sel = allp & strong
        row = {"pass": int(p), "direction": int(ct["direction"][allp][0]),
               "crossings": int(allp.sum()), "modes": int(np.unique(ct["mode"][sel]).size),
               "spacing_steps": None, "spacing_steps_u": None, "offset_steps": None, "consistent": None}
        if coef is not None and sel.sum() >= 3:
            d = ct["direction"][sel]
            x = ct["mode"][sel] - fit["k_centre"]
            resid = ct["position_steps"][sel] - d * (backlash or 0.0) / 2.0 - np.polyval(coef, x)
            A = np.vstack([x, np.ones_like(x)]).T
            (slope, off), *_ = np.linalg.lstsq(A, resid, rcond=None)
            dof = max(x.size - 2, 1)
            s2 = float(np.sum((resid - A @ np.array([slope, off])) ** 2) / dof)
            sxx = float(np.sum((x - x.mean()) ** 2))
            se = math.sqrt(s2 / sxx) if sxx > 0 else None
            overall = abs(coef[-2])
            sign = 1.0 if coef[-2] >= 0 else -1.0
            row["spacing_steps"] = overall + sign * float(slope)
            row["spacing_steps_u"] = se
            row["offset_steps"] = float(np.mean(resid))
            if np.unique(ct["mode"][sel]).size >= 5:
                tol = max(3.0 * math.hypot(se or 0.0, spacing_u or 0.0), 5e-3 * overall)
                row["consistent"] = bool(abs(slope) <= tol and abs(row["offset_steps"]) < 0.25 * overall)
        out.append(row)
    return out


def calibrated_results(cal: physics.Calibration, chip: dict, spacing_steps: float, spacing_u: float,
                       centre_steps: float, mc_draws: int = 100_000) -> dict:
    """physics.calibrated_figures, with the chip length checked by Monte Carlo (JCGM 101)."""
    chip = chip or {}
    ng, ng_u = chip.get("group_index"), float(chip.get("group_index_u") or 0.0)
    out: dict[str, Any] = physics.calibrated_figures(cal, spacing_steps, spacing_u, centre_steps, ng, ng_u)
    if ng:
        order = cal.order
        inputs = physics.chain_inputs(cal, spacing_steps, spacing_u, centre_steps, float(ng), ng_u)
        out["length_um_monte_carlo"] = monte_carlo(      # the same chain, on arrays
            lambda *x: physics.length_from_steps(*x, order), inputs, draws=mc_draws)
    return out


def analyze_trace(position_steps, value, direction=None, pass_index=None, sections: dict | None = None,
                  counter_settings: dict | None = None) -> dict:
    """Count and refine one trace; see the module docstring. JSON-ready dict."""
    pos = np.asarray(position_steps, dtype=np.float64)
    val = np.asarray(value, dtype=np.float64)
    if pos.size != val.size:
        raise ValueError(f"position ({pos.size}) and intensity ({val.size}) differ in length")
    if direction is None or pass_index is None:
        d_guess, p_guess = directions_from_positions(pos)
        direction = d_guess if direction is None else direction
        pass_index = p_guess if pass_index is None else pass_index
    direction = np.asarray(direction, dtype=np.int64)
    pass_index = np.asarray(pass_index, dtype=np.int64)

    c = count(pos, val, direction, counter_settings)
    est = c.estimate()
    mc = c.mode_centres()
    ct = c.crossing_table()
    backlash, mech = mechanical_centres(mc)
    ok = np.isfinite(mech)
    weights = (mc["n_up"] + mc["n_down"])[ok]
    spacing, spacing_u, fit = fit_spacing(mc["mode"][ok], mech[ok], weights)
    centre = fit.get("centre_steps") if fit else None

    result: dict[str, Any] = {
        "modes": c.modes, "crossings": c.crossings,
        "spacing_steps": spacing, "spacing_steps_u": spacing_u,
        "spacing_nm": None, "spacing_nm_u": None, "wavelength_nm": None,
        "length_um": None, "length_um_u": None,
        "backlash_steps": backlash, "budget": None,
        "live_estimate": est,
        "fit": fit,
    }
    result["spectral_period_steps"] = spectral_period_steps(pos, val, pass_index, spacing)
    result["gaps"] = find_gaps(mc["mode"])
    result["per_pass"] = per_pass_results(ct, pass_index, fit, backlash, spacing_u)
    # The fit's standard error only sees scatter about one smooth curve; passes that
    # disagree (drift, a kick-bent pass) are a second, Type A estimate (GUM 4.2):
    # the standard deviation of the pass spacings over sqrt(passes). The larger is used.
    pass_sp = [r["spacing_steps"] for r in result["per_pass"] if r["spacing_steps"] is not None]
    result["spacing_steps_u_fit"] = spacing_u
    dof = fit["dof"] if fit else None
    if spacing is not None and len(pass_sp) >= 2:
        u_passes = float(np.std(pass_sp, ddof=1) / math.sqrt(len(pass_sp)))
        result["spacing_steps_u_passes"] = u_passes
        if u_passes > (spacing_u or 0.0):
            spacing_u, dof = u_passes, len(pass_sp) - 1.0
        result["spacing_steps_u"] = spacing_u
    result["notes"] = fit_notes(fit, len(pass_sp), spacing is not None,
                                int(((sections or {}).get("sweep") or {}).get("passes") or 1))
    if dof is not None:
        from scipy.stats import t as student_t
        # the expanded uncertainty for 95 % coverage is k95 * u with Student's t at the
        # (effective) degrees of freedom of the estimate used (JCGM 100 G.3), not 2
        result["spacing_steps_dof"] = dof
        result["spacing_steps_k95"] = float(student_t.ppf(0.975, dof))
        if dof < DOF_NOTE:
            result["notes"].append(
                f"{dof:.1f} effective degrees of freedom behind the spacing's uncertainty: for 95 % coverage "
                f"multiply it by k = {result['spacing_steps_k95']:.2f} (Student's t), not by 2")
    result["mode_map"] = [
        {"mode": int(k), "centre_up_steps": _f(u), "centre_down_steps": _f(dn), "centre_steps": _f(m),
         "n_up": int(nu), "n_down": int(nd), "height": _f(h), "width_steps": _f(w)}
        for k, u, dn, m, nu, nd, h, w in zip(mc["mode"], mc["centre_up"], mc["centre_down"], mech,
                                             mc["n_up"], mc["n_down"], mc["height"], mc["width_steps"])]

    cal = physics.Calibration.from_sections(sections)
    if spacing and cal is not None and centre is not None:
        chip = (sections or {}).get("chip", {})
        # the calibration holds for the stage moving one way ([stage] calibrated_moving): the
        # mechanical centres are half the backlash from where it reads moving that way
        res = calibrated_results(cal, chip, spacing, spacing_u or 0.0, cal.calibrated_position(centre, backlash))
        result.update(res)
        seen = {"up" if mc["n_up"].sum() else None, "down" if mc["n_down"].sum() else None} - {None}
        if backlash is None and seen and cal.moving not in seen:
            result["notes"].append(
                f"the modes were seen moving {'/'.join(sorted(seen))} only, and the calibration holds moving "
                f"{cal.moving} ([stage] calibrated_moving): with no backlash figure (that needs a pass each "
                "way) the wavelengths can be off by the backlash times the tuning rate")
        for row in result["mode_map"]:
            cs = row["centre_steps"]
            row["wavelength_nm"] = None if cs is None else physics.littrow_wavelength_nm(
                physics.angle_deg(cal.calibrated_position(cs, backlash), cal.deg_per_step, cal.angle_at_zero_deg),
                cal.lines_per_mm, cal.order)
    # The by-count route: N modes over the span their centres cover (no fit needed).
    # The span's uncertainty is that of its two end centres (the fit's residual scatter).
    if ok.sum() >= 2:
        k_ok = mc["mode"][ok]
        i_lo, i_hi = int(np.argmin(k_ok)), int(np.argmax(k_ok))
        span = float(abs(mech[ok][i_hi] - mech[ok][i_lo]))
        n_int = int(k_ok.max() - k_ok.min())
        if n_int > 0:
            u_end = float((fit or {}).get("residual_rms_steps") or 0.0)
            u_span = math.sqrt(2.0) * u_end
            bc = {"modes": n_int + 1, "span_steps": span, "intervals": n_int,
                  "spacing_steps": span / n_int, "spacing_steps_u": u_span / n_int}
            chip = (sections or {}).get("chip", {}) or {}
            if cal is not None and chip.get("group_index"):
                ends = [cal.calibrated_position(float(mech[ok][i]), backlash) for i in (i_lo, i_hi)]
                bc.update(physics.length_by_count_steps(
                    n_int + 1, ends[0], ends[1], u_end, cal,
                    float(chip["group_index"]), float(chip.get("group_index_u") or 0.0)))
            result["by_count"] = bc
    return result


LAG1_NOTE = 0.5    # residual autocorrelation from which the report says so
DOF_NOTE = 10.0    # effective degrees of freedom below which k = 2 is not 95 %


def fit_notes(fit: dict | None, n_passes: int, have_spacing: bool, planned_passes: int = 1) -> list[str]:
    """What the spacing's standard uncertainty leaves out, or how to read it, in words."""
    notes = []
    if have_spacing and n_passes < 2:
        how = ("resume the run to finish its passes" if planned_passes >= 2
               else "sweep back and forth (sweep.passes >= 2)")
        notes.append("one pass only: a drift of the chip's modes during the sweep (temperature, current) "
                     "stretches or shrinks the spacing and cannot be told apart from it, so the spacing's "
                     f"uncertainty leaves it out; {how} to measure it")
    if fit and fit.get("residual_lag1", 0.0) >= LAG1_NOTE:
        notes.append(f"the mode centres wander about the fit (lag-1 autocorrelation {fit['residual_lag1']:.2f}): "
                     f"the spacing's standard error is {fit['se_factor']:.2g} times the least-squares one; "
                     "a drift during the sweep is the usual cause")
    return notes


def _f(x) -> float | None:
    x = float(x)
    return x if math.isfinite(x) else None

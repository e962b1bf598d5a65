"""The report of one logged sweep: PNG figures, summary.json and a short Markdown page.

Figures are drawn with matplotlib's object API on the Agg canvas (no pyplot,
no global state, no display needed). The analysis is the one ``analyze``
runs (``analysis.pipeline.analyze_trace`` on every logged sample, with the
log's own rig unless ``--config`` names another), so ``summary.json`` holds
exactly what ``modetick analyze --json`` prints for the same log.
"""
from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from matplotlib.ticker import MaxNLocator

from daq.numbers import u_decimals
from daq.runlog import LogError, RunLog, Samples

DPI = 110
WIDTH_IN = 13.0
TRACE_PX = int(WIDTH_IN * DPI)      # pixel columns of the trace: the downsampling target
LABEL_PX = 34                       # least distance between two mode labels on the trace
MAX_TRACE_PASSES = 4                # trace panels in one figure
PASS_ROWS_EACH_END = 20             # report.md lists this many passes at each end of a long night
TRACE_COLOUR = "#1f4e79"
BLIP_COLOUR = "#d1495b"
UP_COLOUR, DOWN_COLOUR = "#1f77b4", "#e07b00"

SAFETY_TEXT = (
    "Grating-tuned diode lasers are commonly Class 3B, sometimes Class 4, and often infrared, "
    "hence invisible. Wear eyewear of the right optical density for the wavelength, block the "
    "beam, never look into it or its specular reflections, and use an IR viewer or a camera to "
    "find the spot. Laser diodes are killed by electrostatic discharge and by drive-current or "
    "temperature overshoot; modetick never changes either unless a rig file explicitly allows "
    "it, within configured limits. Your institution's laser safety officer and local rules "
    "(IEC 60825-1, ANSI Z136.1) come first; nothing in this report replaces them.")


# --- the analysed log ---------------------------------------------------------

@dataclass
class AnalyzedLog:
    """One run log with its samples, events, rig, the ``analyze --json`` result and
    the counter's table of crossings (one row per blip seen, all passes)."""

    log: RunLog
    rig: Any                       # daq.rig.Rig
    rig_from: str                  # "the log" or the --config path
    samples: Samples
    events: list[dict]
    result: dict
    crossings: dict[str, np.ndarray] = field(default_factory=dict)

    @property
    def sections(self) -> dict:
        return self.rig.sections

    def calibrated(self) -> bool:
        return self.rig.calibrated() and self.result.get("spacing_nm") is not None


def open_analyzed(path: str, config: str | None = None, overrides: list[str] | None = None,
                  with_crossings: bool = True) -> AnalyzedLog:
    """Open a run log and analyse it as ``modetick analyze --json`` does.

    ``with_crossings`` also keeps the counter's table of single crossings (the
    trace figures need it; the export does not).

    Raises LogError or RigError with a one-line message for bad input.
    """
    from analysis.pipeline import analyze_trace, count
    from daq.cmd_analyze import log_rig
    from daq.rig import load_rig
    from daq.summary import json_ready

    log = RunLog.open(path)
    try:
        rig = load_rig(config, overrides or []) if config else log_rig(log, overrides or [])
        s = log.read_samples()
        if len(s) == 0:
            raise LogError(f"log {path}: holds no samples")
        settings = rig.sections.get("counter")
        result = analyze_trace(s.position_steps, s.value, direction=s.direction,
                               pass_index=s.pass_index, sections=rig.sections, counter_settings=settings)
        result = json_ready(dict(result))
        result["samples"] = int(len(s))
        result["status"] = log.meta("status")
        result["log"] = str(log.path)
        # The result holds per-mode means only; the trace marks every single
        # crossing, so the same counter runs once more for its crossing table.
        pos, val = s.position_steps.astype(np.float64), s.value.astype(np.float64)
        crossings = count(pos, val, s.direction, settings).crossing_table() if with_crossings else {}
        return AnalyzedLog(log, rig, config or "the log", s, log.events(), result, crossings)
    except BaseException:
        log.close()
        raise


# --- reading the analysis result ---------------------------------------------

@dataclass
class PassBlips:
    """Blips of one pass: where they were seen and which mode each one is."""

    pass_index: int
    direction: int
    position_steps: np.ndarray     # blip centres, steps (commanded frame)
    mode: np.ndarray               # mode numbers (int)
    peak: np.ndarray | None = None  # the reading at each blip's peak sample


def pass_directions(s: Samples) -> dict[int, int]:
    """{pass index: direction (+1 up, -1 down)} from the samples."""
    out = {}
    for p in np.unique(s.pass_index).tolist():
        d = s.direction[s.pass_index == p]
        out[int(p)] = 1 if (d.size == 0 or np.mean(d) >= 0) else -1
    return out


def blips_per_pass(a: AnalyzedLog) -> list[PassBlips]:
    """Every crossing the counter made, grouped by the pass it happened in."""
    dirs = pass_directions(a.samples)
    ct = a.crossings
    idx = np.clip(np.asarray(ct.get("index", []), dtype=np.int64), 0, max(len(a.samples) - 1, 0))
    p_of = a.samples.pass_index[idx]
    pos = np.asarray(ct.get("position_steps", []), dtype=float)
    mode = np.asarray(ct.get("mode", []), dtype=np.int64)
    return [PassBlips(p, dirs[p], pos[p_of == p], mode[p_of == p], a.samples.value[idx[p_of == p]])
            for p in sorted(dirs)]


def reversal_positions(a: AnalyzedLog) -> list[float]:
    """Where the sweep turned: the last commanded position before each change of direction."""
    s = a.samples
    turn = np.flatnonzero(np.diff(s.direction) != 0)
    return [float(s.position_steps[i]) for i in turn.tolist()]


def mode_columns(result: dict) -> dict[str, np.ndarray]:
    """The mode map as float columns (None -> NaN): mode, centre, centre_up, centre_down."""
    rows = result.get("mode_map") or []
    col = lambda k: np.array([np.nan if r.get(k) is None else r[k] for r in rows], dtype=float)  # noqa: E731
    return {"mode": col("mode"), "centre": col("centre_steps"), "up": col("centre_up_steps"),
            "down": col("centre_down_steps")}


def nm_per_step(result: dict) -> float | None:
    """Local conversion steps -> nm at the sweep centre (the analysis's own two numbers)."""
    sp, nm = result.get("spacing_steps"), result.get("spacing_nm")
    if sp and nm:
        return abs(nm / sp)
    return None


# --- drawing helpers ---------------------------------------------------------

def _figure(w_in: float, h_in: float):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    fig = Figure(figsize=(w_in, h_in), dpi=DPI, layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def _save(fig, path: Path) -> Path:
    fig.savefig(path, dpi=DPI, facecolor="white")
    return path


def label_stride(n_items: int, span_px: float, min_px: float = LABEL_PX) -> int:
    """Label every k-th item, k in 1, 2, 5, 10, 20, 50..., so labels are >= min_px apart."""
    if n_items <= 1:
        return 1
    need = n_items * min_px / max(span_px, 1.0)
    k = 1
    while k < need:
        k = _next_stride(k)
    return k


def _next_stride(k: int) -> int:
    """1 -> 2 -> 5 -> 10 -> 20 -> 50 -> 100 ..."""
    mag = 10 ** int(math.floor(math.log10(k)))
    lead = k // mag
    return {1: 2, 2: 5}.get(lead, 10) * mag


def minmax_envelope(x: np.ndarray, y: np.ndarray, n_cols: int) -> tuple[np.ndarray, np.ndarray]:
    """Points to draw for a trace: per pixel column its min and max, so narrow blips survive.

    Returns the samples themselves (sorted by x) when there are few enough.
    """
    order = np.argsort(x, kind="stable")
    x, y = np.asarray(x, float)[order], np.asarray(y, float)[order]
    if x.size <= 2 * n_cols or x[0] == x[-1]:
        return x, y
    edges = np.linspace(x[0], x[-1], n_cols + 1)
    start = np.unique(np.searchsorted(x, edges[:-1], side="left"))
    start = start[start < x.size]
    lo = np.fmin.reduceat(y, start)
    hi = np.fmax.reduceat(y, start)
    stop = np.append(start[1:], x.size) - 1
    xc = 0.5 * (x[start] + x[stop])
    return np.repeat(xc, 2), np.column_stack([lo, hi]).ravel()


def _littrow_axis(ax, sections: dict) -> None:
    """A top x axis in Littrow wavelength (nm) from the rig calibration (analysis.physics)."""
    from analysis import physics
    st, gr = sections["stage"], sections["grating"]
    lpm, m = gr["lines_per_mm"], gr["order"] or 1
    a0, dps = st["angle_at_zero_deg"], st["deg_per_step"]

    def angle_of(nm):
        try:
            return physics.littrow_angle_deg(nm, lpm, m)
        except ValueError:
            return math.nan

    to_nm = np.vectorize(lambda x: physics.littrow_wavelength_nm(physics.angle_deg(x, dps, a0), lpm, m),
                         otypes=[float])
    to_steps = np.vectorize(lambda nm: (angle_of(nm) - a0) / dps, otypes=[float])
    top = ax.secondary_xaxis("top", functions=(to_nm, to_steps))
    top.set_xlabel("Littrow wavelength from the rig calibration (nm)")


def trace_passes(passes: list[PassBlips]) -> list[PassBlips]:
    """The passes the trace figure draws: all of up to MAX_TRACE_PASSES, else the first
    two and the last two (a night of many passes would fill pages)."""
    if len(passes) <= MAX_TRACE_PASSES:
        return passes
    return passes[:2] + passes[-2:]


def _draw_pass(ax, s: Samples, pb: PassBlips, lo: float, hi: float, n_passes: int) -> None:
    """One pass's trace between positions lo and hi, its blips marked and numbered."""
    m = (s.pass_index == pb.pass_index) & (s.position_steps >= lo) & (s.position_steps <= hi)
    order = np.argsort(s.position_steps[m], kind="stable")
    x, y = s.position_steps[m][order].astype(float), s.value[m][order]
    xd, yd = minmax_envelope(x, y, TRACE_PX)
    ax.plot(xd, yd, color=TRACE_COLOUR, lw=0.6)
    inside = (pb.position_steps >= lo) & (pb.position_steps <= hi)
    bx, bm = pb.position_steps[inside], pb.mode[inside]
    by = pb.peak[inside] if pb.peak is not None else np.full(bm.size, np.nan)
    # Markers shrink where blips crowd, so they do not merge into a bar over the trace.
    px_per_blip = TRACE_PX / max(bm.size, 1) * (np.ptp(bx) if bm.size > 1 else hi - lo) / max(hi - lo, 1)
    ax.plot(bx, by, "v", ms=float(np.clip(px_per_blip / 3, 1.5, 5)), color=BLIP_COLOUR, ls="none")
    k = label_stride(bm.size, TRACE_PX * (np.ptp(bx) if bm.size > 1 else 1) / max(hi - lo, 1))
    for p, yv, mode in zip(bx.tolist(), by.tolist(), bm.tolist()):
        if mode % k == 0 and math.isfinite(yv):
            ax.annotate(str(mode), (p, yv), xytext=(0, 5), textcoords="offset points",
                        ha="center", va="bottom", fontsize=7.5, color=BLIP_COLOUR)
    if y.size:
        y_lo, y_hi = float(np.nanmin(y)), float(np.nanmax(y))
        ax.set_ylim(y_lo - 0.04 * (y_hi - y_lo), y_hi + 0.16 * ((y_hi - y_lo) or 1.0))
    arrow = "up, steps increasing \u2192" if pb.direction > 0 else "down, steps decreasing \u2190"
    ax.set_title(f"pass {pb.pass_index + 1} of {n_passes}: {arrow};  {bm.size} blips (\u25bc), "
                 + ("mode number on each" if k == 1 else f"mode number on every {k}th"),
                 loc="left", fontsize=10)
    ax.set_ylabel("detector reading\n(instrument units)")
    ax.grid(alpha=0.25)


def fig_trace(a: AnalyzedLog, passes: list[PassBlips], out_dir: Path) -> Path:
    """Figure 1: the trace of each pass, every blip marked, mode numbers, reversals."""
    s = a.samples
    shown = trace_passes(passes) or [PassBlips(0, 1, np.zeros(0), np.zeros(0, int))]
    reversals = reversal_positions(a)
    x_lo, x_hi = float(np.min(s.position_steps)), float(np.max(s.position_steps))
    pad = 0.01 * max(x_hi - x_lo, 1.0)
    fig = _figure(WIDTH_IN, 1.3 + 2.6 * len(shown))
    axes = fig.subplots(len(shown), 1, sharex=True, squeeze=False)[:, 0]
    for ax, pb in zip(axes, shown):
        _draw_pass(ax, s, pb, x_lo, x_hi, len(passes))
        for r in reversals:
            ax.axvline(r, color="0.45", ls="--", lw=1)
    for r in sorted(set(reversals))[-1:]:
        axes[0].annotate("reversal", (r, 0.98), xycoords=("data", "axes fraction"), xytext=(-4, 0),
                         textcoords="offset points", ha="right", va="top", fontsize=8, color="0.3",
                         bbox=dict(boxstyle="round,pad=0.2", fc="white", ec="0.6", lw=0.6))
    axes[-1].set_xlabel("grating actuator position (steps)")
    axes[-1].set_xlim(x_lo - pad, x_hi + pad)
    if a.calibrated():
        _littrow_axis(axes[0], a.sections)
    return _save(fig, out_dir / "trace.png")


def zoom_window(passes: list[PassBlips], spacing_steps: float | None, modes_each_side: int = 6):
    """(lo, hi) steps around the middle counted mode, or None when there is nothing to zoom."""
    pos = next((pb.position_steps for pb in passes if pb.position_steps.size >= 3), np.zeros(0))
    if pos.size < 3 or not spacing_steps:
        return None
    # Centred on a blip, so the window edges fall between blips, not across one.
    mid = float(pos[np.argmin(np.abs(pos - np.median(pos)))])
    half = (modes_each_side + 0.5) * abs(spacing_steps)
    return mid - half, mid + half


def fig_trace_zoom(a: AnalyzedLog, passes: list[PassBlips], out_dir: Path) -> Path | None:
    """Figure 1b: a dozen modes at full resolution, first up and first down pass one above
    the other on one position axis, so each blip, its number and the backlash shift show."""
    win = zoom_window(passes, a.result.get("spacing_steps"))
    if win is None:
        return None
    ups = [pb for pb in passes if pb.direction > 0][:1]
    downs = [pb for pb in passes if pb.direction < 0][:1]
    shown = ups + downs
    fig = _figure(WIDTH_IN, 1.3 + 2.4 * len(shown))
    axes = fig.subplots(len(shown), 1, sharex=True, squeeze=False)[:, 0]
    for ax, pb in zip(axes, shown):
        _draw_pass(ax, a.samples, pb, win[0], win[1], len(passes))
    axes[-1].set_xlabel("grating actuator position (steps)")
    axes[-1].set_xlim(*win)
    fig.suptitle("detail: the middle of the counted range at full resolution "
                 "(\u25bc at the counter's blip centre, drawn at the blip's peak reading)",
                 x=0.01, ha="left", fontsize=11)
    return _save(fig, out_dir / "trace-detail.png")


def fit_curve(result: dict, modes: np.ndarray) -> np.ndarray | None:
    """The analysis's centre-against-mode polynomial evaluated at the given modes."""
    fit = result.get("fit") or {}
    if not fit.get("coef"):
        return None
    return np.polyval(np.asarray(fit["coef"], float), modes - float(fit["k_centre"]))


def fit_residuals(result: dict):
    """(mode, centre, residual, left out) of the analysis's fit, or None without a fit.

    The analysis reports how many centres it left out, not which: they are the ones
    farthest from its final curve (it drops those beyond 5 MAD of the residuals).
    """
    mc = mode_columns(result)
    ok = np.isfinite(mc["centre"])
    k, c = mc["mode"][ok], mc["centre"][ok]
    curve = fit_curve(result, k)
    if curve is None or k.size < 2:
        return None
    res = c - curve
    out = np.zeros(k.size, bool)
    n_out = int(result["fit"].get("outliers") or 0)
    if n_out:
        out[np.argsort(-np.abs(res))[:n_out]] = True
    return k, c, res, out


def fig_fit(a: AnalyzedLog, out_dir: Path) -> Path | None:
    """Figure 2: blip centre against mode number, the analysis's fit, and its residuals."""
    fr = fit_residuals(a.result)
    if fr is None:
        return None
    k, c, res, out = fr
    n_out = int(out.sum())
    r, fit = a.result, a.result["fit"]
    fig = _figure(WIDTH_IN * 0.75, 7.0)
    top, bot = fig.subplots(2, 1, sharex=True, height_ratios=[1.4, 1])
    top.plot(k, c, "o", ms=3.5, color=UP_COLOUR, ls="none", label=f"blip centre ({k.size} modes)")
    kk = np.linspace(k.min(), k.max(), 400)
    shape = {1: "straight line", 2: "quadratic"}.get(fit.get("degree"), f"degree {fit.get('degree')}")
    text = (f"{shape} fit; spacing = slope at mode {fit['k_centre']:g}:\n"
            f"{_pm(r.get('spacing_steps'), r.get('spacing_steps_u'))} steps per mode")
    if r.get("spacing_nm") is not None:
        text += f" = {_pm(r.get('spacing_nm'), r.get('spacing_nm_u'))} nm"
    top.plot(kk, fit_curve(r, kk), "-", color=BLIP_COLOUR, lw=1.2, label=text)
    top.legend(loc="upper left", fontsize=9, framealpha=0.9)
    top.set_ylabel("blip centre (steps)")
    top.set_title("blip centre against mode number (mean of up and down passes, backlash split evenly)",
                  loc="left", fontsize=10.5)
    top.grid(alpha=0.25)
    kept = res[~out]
    bot.plot(k[~out], kept, "o", ms=3.5, color=UP_COLOUR, ls="none", label="used in the fit")
    if n_out:
        bot.plot(k[out], res[out], "o", ms=5, mfc="none", color=BLIP_COLOUR, ls="none",
                 label=f"left out of the fit ({n_out})")
        bot.legend(fontsize=8, framealpha=0.9, loc="best")
    bot.axhline(0, color="0.3", lw=0.8)
    bot.set_ylabel("residual (steps)")
    bot.set_xlabel("mode number")
    bot.set_title(f"residuals from the fit (rms {float(np.sqrt(np.mean(kept ** 2))):.3g} steps over the modes used)",
                  loc="left", fontsize=10)
    bot.grid(alpha=0.25)
    f = nm_per_step(r)
    if f:
        ax2 = bot.secondary_yaxis("right", functions=(lambda v: v * f * 1e3, lambda v: v / (f * 1e3)))
        ax2.set_ylabel("residual (pm)")
    return _save(fig, out_dir / "fit.png")


def centre_differences(passes: list[PassBlips]) -> np.ndarray:
    """Distances between blips of neighbouring mode numbers within each pass (steps).

    A missed mode shows up as a distance of about two spacings."""
    parts = []
    for pb in passes:
        if pb.mode.size > 1:
            order = np.argsort(pb.mode, kind="stable")
            parts.append(np.abs(np.diff(pb.position_steps[order])))
    return np.concatenate(parts) if parts else np.zeros(0)


def spacing_bins(d: np.ndarray, max_bins: int = 60) -> np.ndarray:
    """Histogram edges; centred on whole steps when every distance is a whole number of
    steps (a stepped sweep), so no bin straddles two values and none stays empty between."""
    lo, hi = float(np.min(d)), float(np.max(d))
    if np.allclose(d, np.round(d), atol=1e-9):
        width = max(1, int(math.ceil((hi - lo + 1) / max_bins)))
        return np.arange(round(lo) - 0.5, round(hi) + 0.5 + width, width)
    edges = np.histogram_bin_edges(d, bins="auto")
    return edges if edges.size <= max_bins + 1 else np.linspace(lo, hi, max_bins + 1)


def fig_spacings(a: AnalyzedLog, passes: list[PassBlips], out_dir: Path) -> Path | None:
    """Figure 3: histogram of successive centre differences, with the fitted spacing."""
    d = centre_differences(passes)
    if d.size < 2:
        return None
    fig = _figure(WIDTH_IN * 0.65, 4.6)
    ax = fig.subplots()
    ax.hist(d, bins=spacing_bins(d), color="#5b8db8", edgecolor="white", linewidth=0.5,
            label=f"{d.size} neighbour pairs")
    sp = a.result.get("spacing_steps")
    if sp:
        ax.axvline(abs(sp), color=BLIP_COLOUR, lw=1.5,
                   label=f"fitted spacing {_pm(abs(sp), a.result.get('spacing_steps_u'))} steps")
    med = float(np.median(d))
    ax.axvline(med, color="0.2", ls=":", lw=1.4, label=f"median {med:.4g} steps")
    ax.set_xlabel("distance between the centres of neighbouring modes, within one pass (steps)")
    ax.set_ylabel("number of neighbour pairs")
    ax.yaxis.set_major_locator(MaxNLocator(integer=True))
    ax.set_title(f"spread of the mode spacing: standard deviation {np.std(d, ddof=1):.3g} steps",
                 loc="left", fontsize=11)
    # Below the axes: inside, it would hide the bars it explains.
    fig.legend(loc="outside lower center", ncols=3, fontsize=9, frameon=False)
    ax.grid(alpha=0.25)
    f = nm_per_step(a.result)
    if f:
        top = ax.secondary_xaxis("top", functions=(lambda v: v * f, lambda v: v / f))
        top.set_xlabel("distance (nm)")
    return _save(fig, out_dir / "spacings.png")


def backlash_offsets(result: dict) -> tuple[np.ndarray, np.ndarray]:
    """(mode, up centre - down centre) for the modes the map has in both directions."""
    mc = mode_columns(result)
    both = np.isfinite(mc["up"]) & np.isfinite(mc["down"])
    return mc["mode"][both].astype(int), (mc["up"] - mc["down"])[both]


def fig_backlash(a: AnalyzedLog, out_dir: Path) -> Path | None:
    """Figure 4: per-mode offset of up against down passes (backlash)."""
    modes, off = backlash_offsets(a.result)
    if modes.size == 0:
        return None
    fig = _figure(WIDTH_IN * 0.75, 4.6)
    ax = fig.subplots()
    ax.plot(modes, off, "o", ms=3.5, color="#6a4c93", ls="none",
            label=f"{modes.size} modes seen in both directions")
    bl = a.result.get("backlash_steps")
    if bl is not None:
        ax.axhline(bl, color=BLIP_COLOUR, lw=1.5, label=f"backlash (median offset) {bl:.3g} steps")
    ax.set_xlabel("mode number")
    ax.set_ylabel("centre up \u2212 centre down (steps)")
    ax.set_title("up against down passes: where each mode was seen going up and going down",
                 loc="left", fontsize=11)
    ax.legend(fontsize=9, framealpha=0.9)
    ax.grid(alpha=0.25)
    return _save(fig, out_dir / "backlash.png")


def fig_passes(a: AnalyzedLog, out_dir: Path) -> Path | None:
    """Figure 6 (three passes or more): blips and spacing pass by pass, to spot a bad pass."""
    rows = a.result.get("per_pass") or []
    if len(rows) < 3:
        return None
    p = np.array([r["pass"] + 1 for r in rows])
    up = np.array([r["direction"] > 0 for r in rows])
    fig = _figure(WIDTH_IN * 0.75, 6.0)
    top, bot = fig.subplots(2, 1, sharex=True)
    n = np.array([r["crossings"] for r in rows])
    # Dots, not bars from zero: a pass that lost one mode of 160 must stand out.
    top.plot(p[up], n[up], "o", ms=6, color=UP_COLOUR, ls="none", label="up pass")
    top.plot(p[~up], n[~up], "s", ms=6, color=DOWN_COLOUR, ls="none", label="down pass")
    if a.result.get("modes"):
        top.axhline(a.result["modes"], color="0.3", ls=":", lw=1.2, label=f"modes counted, all passes ({a.result['modes']})")
    lo, hi = min(n.min(), a.result.get("modes") or n.min()), max(n.max(), a.result.get("modes") or n.max())
    top.set_ylim(lo - 1.5 - 0.1 * (hi - lo), hi + 1.5 + 0.1 * (hi - lo))
    top.yaxis.set_major_locator(MaxNLocator(integer=True))
    top.set_ylabel("blips seen in the pass")
    top.set_title("pass by pass: blips seen and spacing", loc="left", fontsize=11)
    top.grid(alpha=0.25)
    sp = np.array([np.nan if r.get("spacing_steps") is None else r["spacing_steps"] for r in rows])
    su = np.array([0.0 if r.get("spacing_steps_u") is None else r["spacing_steps_u"] for r in rows])
    for sel, colour in ((up, UP_COLOUR), (~up, DOWN_COLOUR)):
        bot.errorbar(p[sel], sp[sel], yerr=su[sel], fmt="o" if colour == UP_COLOUR else "s", ms=5,
                     color=colour, capsize=2)
    if a.result.get("spacing_steps"):
        bot.axhline(a.result["spacing_steps"], color=BLIP_COLOUR, lw=1.2, label="spacing, all passes together")
    bot.set_ylabel("spacing in the pass (steps)")
    bot.set_xlabel("pass")
    bot.xaxis.set_major_locator(MaxNLocator(integer=True))
    bot.grid(alpha=0.25)
    fig.legend(loc="outside lower center", ncols=4, fontsize=9, frameon=False)
    return _save(fig, out_dir / "passes.png")


def _pm(v: Any, u: Any) -> str:
    """'46.21 \u00b1 0.12': u to two significant digits, the value to match."""
    if v is None:
        return "n/a"
    text, unc = _vu(v, u, "")
    return f"{text.strip()} \u00b1 {unc.strip()}" if unc else text.strip()


# --- the uncertainty budget ---------------------------------------------------

def fig_budget(a: AnalyzedLog, out_dir: Path) -> Path | None:
    """Figure 5: the uncertainty budget of the chip length, largest contribution on top.

    Rows are the analysis's GUM budget (input, contribution = |sensitivity| x u,
    share of the variance); inputs given without an uncertainty are shown as such,
    since a zero there is often a missing number rather than a perfect one.
    """
    rows = [r for r in (a.result.get("budget") or []) if r.get("contribution") is not None]
    if not rows:
        return None
    rows = sorted(rows, key=lambda r: r["contribution"])
    fig = _figure(WIDTH_IN * 0.7, 1.5 + 0.5 * len(rows))
    ax = fig.subplots()
    vals = [r["contribution"] for r in rows]
    bars = ax.barh([r["input"] for r in rows], vals, color="#5b8db8")
    for b, r in zip(bars, rows):
        if not r.get("u"):
            given_by_rig = str(r.get("input", "")).startswith("[")
            label = "no uncertainty given in the rig (u = 0)" if given_by_rig else "taken as exact (u = 0)"
        else:
            share = 100 * (r.get("share") or 0.0)
            label = f"{r['contribution']:.3g} \u00b5m  ({share:.0f} % of the variance)" if share >= 1 else \
                f"{r['contribution']:.2g} \u00b5m  (< 1 % of the variance)"
        ax.annotate(label, (b.get_width(), b.get_y() + b.get_height() / 2), xytext=(4, 0),
                    textcoords="offset points", va="center", fontsize=9)
    ax.set_xlim(0, max(max(vals), 1e-12) * 1.6)
    ax.set_xlabel("contribution to the standard uncertainty of the chip length (\u00b5m)")
    r = a.result
    ax.set_title(f"uncertainty budget: chip length {_pm(r.get('length_um'), r.get('length_um_u'))} \u00b5m (k = 1)",
                 loc="left", fontsize=11)
    ax.grid(alpha=0.25, axis="x")
    return _save(fig, out_dir / "budget.png")


# --- the Markdown page -------------------------------------------------------

def _fmt(v: Any) -> str:
    if v is None:
        return "n/a"
    if isinstance(v, float):
        return f"{v:.6g}"
    return str(v).replace("|", "\\|")      # a bar would end the Markdown table cell


def _toml_value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, str):
        return json.dumps(v)
    if isinstance(v, list):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    return repr(v)


def rig_toml(sections: dict) -> str:
    """The resolved rig as TOML text (keys left unset are shown as comments)."""
    lines = []
    for name, table in sections.items():
        if not table:
            continue
        lines.append(f"[{name}]")
        for k, v in table.items():
            lines.append(f"# {k} not set" if v is None else f"{k} = {_toml_value(v)}")
        lines.append("")
    return "\n".join(lines).rstrip() + "\n"


def _inputs_table(a: AnalyzedLog) -> list[tuple[str, str, str, str]]:
    """(input, value, standard uncertainty, source) for what the result depends on."""
    sec, r = a.sections, a.result
    st, gr, ch = sec["stage"], sec["grating"], sec["chip"]
    fit = r.get("fit") or {}
    rows = [("mode spacing in actuator steps", _fmt(r.get("spacing_steps")), _fmt(r.get("spacing_steps_u")),
             f"this log: fit of blip centre against mode number ({_fmt(fit.get('n_modes'))} modes, "
             f"{_fmt(r.get('crossings'))} blips over all passes)")]
    rows.append(("actuator calibration (deg/step)", _fmt(st["deg_per_step"]), _fmt(st["deg_per_step_u"]),
                 "rig `[stage] deg_per_step`, `deg_per_step_u`"))
    rows.append(("grating angle at step 0 (deg)", _fmt(st["angle_at_zero_deg"]), _fmt(st["angle_at_zero_deg_u"]),
                 "rig `[stage] angle_at_zero_deg`, `angle_at_zero_deg_u`"))
    rows.append(("grating groove density (lines/mm)", _fmt(gr["lines_per_mm"]), _fmt(gr["lines_per_mm_u"]),
                 "rig `[grating] lines_per_mm`, `lines_per_mm_u`"))
    rows.append(("diffraction order", _fmt(gr["order"]), "exact", "rig `[grating] order`"))
    rows.append(("chip group index", _fmt(ch["group_index"]), _fmt(ch["group_index_u"]),
                 "rig `[chip] group_index`, `group_index_u`"))
    counter = sec.get("counter") or {}
    if counter:
        rows.append(("counter settings", ", ".join(f"{k} = {_fmt(v)}" for k, v in counter.items()), "",
                     "rig `[counter]` (defaults where the rig sets none)"))
    return rows


def _table(header: list[str], rows: list[list[Any]]) -> list[str]:
    out = ["| " + " | ".join(header) + " |", "|" + "---|" * len(header)]
    out += ["| " + " | ".join(_fmt(v) for v in row) + " |" for row in rows]
    return out + [""]


def _vu(v: Any, u: Any, unit: str) -> list[str]:
    """[value, uncertainty] as text: u to two significant digits, the value to match
    (the GUM's advice, JCGM 100 section 7.2.6); the full numbers are in summary.json."""
    if v is None:
        return ["n/a", ""]
    if u is None or not math.isfinite(u) or u <= 0:
        return [f"{_fmt(v)} {unit}", ""]
    digits = u_decimals(u)
    return [f"{v:.{digits}f} {unit}", f"{u:.{digits}f} {unit}"]


def _result_rows(r: dict) -> list[list[str]]:
    rows = [["modes counted", _fmt(r.get("modes")), ""],
            ["blips seen, all passes", _fmt(r.get("crossings")), ""],
            ["mode spacing", *_vu(r.get("spacing_steps"), r.get("spacing_steps_u"), "steps")]]
    if r.get("spacing_nm") is not None:
        rows.append(["mode spacing", *_vu(r.get("spacing_nm"), r.get("spacing_nm_u"), "nm")])
        rows.append(["wavelength at the centre of the counted range",
                     *_vu(r.get("wavelength_nm"), r.get("wavelength_nm_u"), "nm")])
    if r.get("length_um") is not None:
        rows.append(["chip length", *_vu(r.get("length_um"), r.get("length_um_u"), "\u00b5m")])
        mc = r.get("length_um_monte_carlo") or {}
        if mc:
            lo, hi = (mc.get("interval95") or [None, None])[:2]
            v, u = _vu(mc.get("mean"), mc.get("u"), "\u00b5m")
            rows.append([f"chip length, Monte Carlo check (JCGM 101, {_fmt(mc.get('draws'))} draws)",
                         f"{v} (95 % interval {lo:.4g} to {hi:.4g})" if lo is not None else v, u])
    if r.get("backlash_steps") is not None:
        rows.append(["backlash (median up \u2212 down offset)", f"{r['backlash_steps']:.3g} steps", ""])
    if r.get("spectral_period_steps") is not None:
        rows.append(["cross-check: period of the trace (Lomb-Scargle)", f"{r['spectral_period_steps']:.6g} steps", ""])
    bc = r.get("by_count") or {}
    if bc:
        rows.append([f"cross-check: by count ({_fmt(bc.get('intervals'))} intervals over "
                     f"{bc.get('span_steps', 0):.6g} steps; the mean over the range, where the fit "
                     "gives the local spacing at the middle mode)",
                     *_vu(bc.get("spacing_steps"), bc.get("spacing_steps_u"), "steps")])
    return rows


def write_markdown(a: AnalyzedLog, figures: list[Path], notes: list[str], path: Path) -> Path:
    r, log = a.result, a.log
    passes = pass_directions(a.samples)
    ups = sum(1 for d in passes.values() if d > 0)
    reason = log.meta("reason")
    md = [f"# modetick report: {log.path.name}", ""]
    md += _table(["run", ""], [
        ["log", f"`{log.path}`"],
        ["started / ended (UTC)", f"{log.meta('started_utc') or 'n/a'} / {log.meta('ended_utc') or 'n/a'}"],
        ["status", (r.get("status") or "n/a") + (f" ({reason})" if reason else "")],
        ["samples", f"{r.get('samples')} in {len(passes)} pass{'es' if len(passes) != 1 else ''} "
                    f"({ups} up, {len(passes) - ups} down)"],
        ["written by", f"modetick {log.meta('program_version') or '?'}"]])
    md += ["> **Laser safety.** " + SAFETY_TEXT, ""]

    md += ["## Result", ""]
    md += _table(["quantity", "value", "standard uncertainty (k = 1)"], _result_rows(r))
    md += [f"- {n}" for n in notes] + ([""] if notes else [])

    overrides = ", ".join(f"`{o}`" for o in a.rig.overrides)
    where = "the rig stored in the log" if a.rig_from == "the log" else f"`{a.rig_from}`"
    md += ["## Inputs and their sources", "",
           f"Calibration and chip data come from {where} (rig file `{a.rig.source}`"
           + (f", overrides {overrides}" if overrides else "") + ").", ""]
    md += _table(["input", "value", "standard uncertainty", "source"], [list(t) for t in _inputs_table(a)])

    budget = r.get("budget") or []
    if budget:
        md += ["## Uncertainty budget of the chip length (GUM, JCGM 100)", ""]
        md += _table(["input", "value", "standard uncertainty", "sensitivity (\u00b5m per unit)",
                      "contribution (\u00b5m)", "share of the variance", "source"],
                     [[b.get("input"), b.get("value"), b.get("u"), b.get("sensitivity"), b.get("contribution"),
                       f"{100 * (b.get('share') or 0):.1f} %", b.get("source")] for b in budget])

    per_pass = r.get("per_pass") or []
    if len(per_pass) > 1:
        md += ["## Pass by pass", ""]
        shown = per_pass if len(per_pass) <= 2 * PASS_ROWS_EACH_END else \
            per_pass[:PASS_ROWS_EACH_END] + [None] + per_pass[-PASS_ROWS_EACH_END:]
        md += _table(["pass", "direction", "blips", "modes", "spacing (steps)", "standard uncertainty (steps)"],
                     [["\u2026", f"{len(per_pass) - 2 * PASS_ROWS_EACH_END} passes left out here "
                       "(all are in summary.json, per_pass)", "", "", "", ""] if p is None else
                      [p["pass"] + 1, "up" if p["direction"] > 0 else "down", p["crossings"], p["modes"],
                       p.get("spacing_steps"), p.get("spacing_steps_u")] for p in shown])

    gaps = r.get("gaps") or []
    warnings = [e for e in a.events if e["kind"] in ("warning", "fault")]
    if gaps or warnings:
        md += ["## Gaps, warnings and faults", ""]
        md += [f"- gap in the mode numbers after mode {g.get('after_mode')}: {g.get('missing')} "
               "mode(s) never seen (probably missed)" for g in gaps]
        md += [f"- {e['kind']} at sample {e['i']}: {e['detail']}" for e in warnings]
        md += [""]

    if figures:
        md += ["## Figures", ""]
        for p in figures:
            md += [f"![{FIGURE_TITLES.get(p.stem, p.stem)}]({p.name})", ""]

    md += ["## Rig as used", "", "```toml", rig_toml(a.sections).rstrip(), "```", ""]
    path.write_text("\n".join(md), encoding="utf-8")
    return path


FIGURE_TITLES = {
    "trace": "the trace of each pass, blips marked and numbered",
    "trace-detail": "a dozen modes at full resolution, up and down pass",
    "fit": "blip centre against mode number, fit and residuals",
    "spacings": "spread of the spacing between neighbouring modes",
    "backlash": "up against down passes (backlash)",
    "budget": "uncertainty budget of the chip length",
    "passes": "blips and spacing pass by pass",
}


# --- everything ----------------------------------------------------------------

def report_notes(a: AnalyzedLog, passes: list[PassBlips]) -> list[str]:
    notes = []
    if not a.calibrated():
        notes.append("No calibration in the rig (`[stage] deg_per_step`, `[stage] angle_at_zero_deg`, "
                     "`[grating] lines_per_mm`): spacing in actuator steps only, no nm figures, "
                     "no wavelength and no chip length.")
    elif a.result.get("length_um") is None:
        notes.append("No group index in the rig (`[chip] group_index`): no chip length and no budget.")
    if len({pb.direction for pb in passes}) < 2:
        notes.append("The sweep went one way only: no up-against-down (backlash) figure; "
                     "that needs at least one up and one down pass.")
    if len(passes) > MAX_TRACE_PASSES:
        shown = ", ".join(str(pb.pass_index + 1) for pb in trace_passes(passes))
        notes.append(f"The trace figure shows passes {shown} of {len(passes)}; passes.png has every pass.")
    if a.result.get("fit") in (None, {}):
        notes.append("Too few modes for a fit (three or more are needed): no fit figure.")
    notes += [n[0].upper() + n[1:] + "." for n in a.result.get("notes") or []]
    return notes


def write_report(a: AnalyzedLog, out_dir: Path) -> dict:
    """All figures, summary.json and report.md into out_dir; returns what was written."""
    out_dir.mkdir(parents=True, exist_ok=True)
    passes = blips_per_pass(a)
    notes = report_notes(a, passes)
    drawn = [fig_trace(a, passes, out_dir), fig_trace_zoom(a, passes, out_dir), fig_fit(a, out_dir), fig_spacings(a, passes, out_dir),
             fig_backlash(a, out_dir), fig_budget(a, out_dir), fig_passes(a, out_dir)]
    figures = [p for p in drawn if p is not None]
    summary = out_dir / "summary.json"
    summary.write_text(json.dumps(a.result, indent=2) + "\n", encoding="utf-8")
    md = write_markdown(a, figures, notes, out_dir / "report.md")
    return {"figures": figures, "summary": summary, "markdown": md, "notes": notes}

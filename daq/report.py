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

from daq.runlog import LogError, RunLog, Samples

DPI = 110
WIDTH_IN = 13.0
TRACE_PX = int(WIDTH_IN * DPI)      # pixel columns of the trace: the downsampling target
LABEL_PX = 34                       # least distance between two mode labels on the trace
PASSES_PER_PAGE = 4                 # trace panels per figure
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
    """One run log with its samples, events, rig and the ``analyze --json`` result."""

    log: RunLog
    rig: Any                       # daq.rig.Rig
    rig_from: str                  # "the log" or the --config path
    samples: Samples
    events: list[dict]
    result: dict
    notes: list[str] = field(default_factory=list)

    @property
    def sections(self) -> dict:
        return self.rig.sections

    def calibrated(self) -> bool:
        return self.rig.calibrated() and self.result.get("spacing_nm") is not None


def open_analyzed(path: str, config: str | None = None, overrides: list[str] | None = None) -> AnalyzedLog:
    """Open a run log and analyse it as ``modetick analyze --json`` does.

    Raises LogError or RigError with a one-line message for bad input.
    """
    from analysis.pipeline import analyze_trace
    from daq.cmd_analyze import _log_rig
    from daq.rig import load_rig
    from daq.summary import _clean

    log = RunLog.open(path)
    try:
        rig = load_rig(config, overrides or []) if config else _log_rig(log, overrides or [])
        s = log.read_samples()
        if len(s) == 0:
            raise LogError(f"log {path}: holds no samples")
        sections = rig.sections
        result = analyze_trace(s.position_steps, s.value, direction=s.direction,
                               pass_index=s.pass_index, sections=sections,
                               counter_settings=sections.get("counter"))
        result = _clean(dict(result))
        result["samples"] = int(len(s))
        result["status"] = log.meta("status")
        result["log"] = str(log.path)
        return AnalyzedLog(log, rig, config or "the log", s, log.events(), result)
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


def pass_directions(s: Samples) -> dict[int, int]:
    """{pass index: direction (+1 up, -1 down)} from the samples."""
    out = {}
    for p in np.unique(s.pass_index).tolist():
        d = s.direction[s.pass_index == p]
        out[int(p)] = 1 if (d.size == 0 or np.mean(d) >= 0) else -1
    return out


def blips_per_pass(a: AnalyzedLog) -> list[PassBlips]:
    """The blips each pass saw, numbered by mode, from the logged blip events."""
    dirs = pass_directions(a.samples)
    rows: dict[int, list[tuple[float, int]]] = {p: [] for p in dirs}
    n = len(a.samples)
    for e in a.events:
        if e["kind"] != "blip" or e["pos"] is None or e["mode"] is None:
            continue
        i = min(max(int(e["i"] or 0), 0), n - 1)
        p = int(a.samples.pass_index[i])
        rows.setdefault(p, []).append((float(e["pos"]), int(e["mode"])))
    out = []
    for p in sorted(rows):
        pos = np.array([r[0] for r in rows[p]], dtype=float)
        mode = np.array([r[1] for r in rows[p]], dtype=int)
        out.append(PassBlips(p, dirs.get(p, 1), pos, mode))
    return out


def reversal_positions(a: AnalyzedLog) -> list[float]:
    """Turning points of the sweep: logged reversal events, else the ends of each pass."""
    rev = [float(e["pos"]) for e in a.events if e["kind"] == "reversal" and e["pos"] is not None]
    if rev:
        return rev
    s = a.samples
    out = []
    change = np.flatnonzero(np.diff(s.pass_index) != 0)
    for i in change.tolist():
        if s.direction[i] != s.direction[i + 1]:
            out.append(float(s.position_steps[i]))
    return out


def nm_per_step(result: dict) -> float | None:
    """Local conversion steps -> nm near the sweep centre (from the analysis's own numbers)."""
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


def _peak_near(x: np.ndarray, y: np.ndarray, at: np.ndarray, half_width: float) -> np.ndarray:
    """Highest reading within +-half_width of each position (x sorted)."""
    out = np.empty(at.size)
    for k, p in enumerate(at.tolist()):
        i0, i1 = np.searchsorted(x, [p - half_width, p + half_width])
        seg = y[i0:max(i1, i0 + 1)]
        out[k] = np.nanmax(seg) if seg.size else np.nan
    return out


def _littrow_axis(ax, sections: dict) -> None:
    """A top x axis in Littrow wavelength (nm), from the rig's calibration.

    Grating equation in Littrow, m*lambda = 2*d*sin(theta) (Palmer, Diffraction
    Grating Handbook), with theta = angle_at_zero_deg + deg_per_step * steps.
    """
    st, gr = sections["stage"], sections["grating"]
    d_nm = 1e6 / gr["lines_per_mm"]
    m = gr["order"] or 1
    a0, dps = st["angle_at_zero_deg"], st["deg_per_step"]

    def to_nm(steps):
        return 2 * d_nm * np.sin(np.radians(a0 + dps * np.asarray(steps, float))) / m

    def to_steps(nm):
        s = np.clip(np.asarray(nm, float) * m / (2 * d_nm), -1, 1)
        return (np.degrees(np.arcsin(s)) - a0) / dps

    top = ax.secondary_xaxis("top", functions=(to_nm, to_steps))
    top.set_xlabel("Littrow wavelength from the rig calibration (nm)")


def _chunks(items: list, n: int) -> list[list]:
    return [items[i:i + n] for i in range(0, len(items), n)] or [[]]


def fig_trace(a: AnalyzedLog, passes: list[PassBlips], out_dir: Path) -> list[Path]:
    """Figure 1: the trace of each pass, every blip marked, mode numbers, reversals."""
    s = a.samples
    reversals = reversal_positions(a)
    x_all = s.position_steps
    x_lo, x_hi = float(np.min(x_all)), float(np.max(x_all))
    pad = 0.01 * max(x_hi - x_lo, 1.0)
    paths = []
    for page_no, page in enumerate(_chunks(passes, PASSES_PER_PAGE)):
        fig = _figure(WIDTH_IN, 1.3 + 2.6 * max(len(page), 1))
        axes = fig.subplots(max(len(page), 1), 1, sharex=True, squeeze=False)[:, 0]
        for ax, pb in zip(axes, page):
            m = s.pass_index == pb.pass_index
            order = np.argsort(s.position_steps[m], kind="stable")
            x, y = s.position_steps[m][order].astype(float), s.value[m][order]
            xd, yd = minmax_envelope(x, y, TRACE_PX)
            ax.plot(xd, yd, color=TRACE_COLOUR, lw=0.7)
            spacing = abs(a.result.get("spacing_steps") or 0) or (x_hi - x_lo) / max(len(pb.mode), 1)
            y_pk = _peak_near(x, y, pb.position_steps, 0.25 * spacing)
            ax.plot(pb.position_steps, y_pk, "v", ms=4, color=BLIP_COLOUR, ls="none")
            span_px = TRACE_PX * (np.ptp(pb.position_steps) if pb.mode.size > 1 else 1) / max(x_hi - x_lo, 1)
            k = label_stride(pb.mode.size, span_px)
            for p, yv, mode in zip(pb.position_steps.tolist(), y_pk.tolist(), pb.mode.tolist()):
                if mode % k == 0 and math.isfinite(yv):
                    ax.annotate(str(mode), (p, yv), xytext=(0, 6), textcoords="offset points",
                                ha="center", va="bottom", fontsize=7, color=BLIP_COLOUR)
            y_lo, y_hi = float(np.nanmin(y)), float(np.nanmax(y))
            ax.set_ylim(y_lo - 0.04 * (y_hi - y_lo), y_hi + 0.16 * (y_hi - y_lo or 1))
            for r in reversals:
                ax.axvline(r, color="0.45", ls="--", lw=1)
            arrow = "up, steps increasing \u2192" if pb.direction > 0 else "down, steps decreasing \u2190"
            ax.set_title(f"pass {pb.pass_index + 1}: {arrow};  {pb.mode.size} blips (\u25bc), "
                         + ("mode number on each" if k == 1 else f"mode number on every {k}th"),
                         loc="left", fontsize=10)
            ax.set_ylabel("detector reading\n(instrument units)")
            ax.grid(alpha=0.25)
        for r in reversals:
            axes[0].annotate("reversal", (r, 0.5), xycoords=("data", "axes fraction"), rotation=90,
                             xytext=(-3, 0), textcoords="offset points", ha="right", va="center",
                             fontsize=8, color="0.35")
        axes[-1].set_xlabel("grating actuator position (steps)")
        axes[-1].set_xlim(x_lo - pad, x_hi + pad)
        if a.calibrated():
            _littrow_axis(axes[0], a.sections)
        name = "trace.png" if page_no == 0 else f"trace-{page_no + 1}.png"
        paths.append(_save(fig, out_dir / name))
    return paths


def _fit_lines(passes: list[PassBlips], slope: float | None):
    """Per direction: (mode, centre, line) with one common slope (steps per mode).

    With the analysis's slope the intercept per direction is the least-squares
    one for that slope (mean of centre - slope*mode); without it the common
    slope is fitted here.
    """
    by_dir: dict[int, tuple[np.ndarray, np.ndarray]] = {}
    for pb in passes:
        mm, cc = by_dir.get(pb.direction, (np.zeros(0, int), np.zeros(0)))
        by_dir[pb.direction] = (np.append(mm, pb.mode), np.append(cc, pb.position_steps))
    by_dir = {d: v for d, v in by_dir.items() if v[0].size}
    if slope is None:
        # Common slope across directions: centre each direction, then one regression.
        dm = np.concatenate([m - m.mean() for m, _ in by_dir.values()])
        dc = np.concatenate([c - c.mean() for _, c in by_dir.values()])
        slope = float(dm @ dc / (dm @ dm)) if dm @ dm > 0 else 0.0
    else:
        # The analysis reports a magnitude; the sign is the sweep's own.
        dm = np.concatenate([m - m.mean() for m, _ in by_dir.values()])
        dc = np.concatenate([c - c.mean() for _, c in by_dir.values()])
        slope = math.copysign(abs(slope), float(dm @ dc) if dm.size else 1.0)
    out = {}
    for d, (m, c) in by_dir.items():
        b = float(np.mean(c - slope * m))
        out[d] = (m, c, slope * m + b)
    return slope, out


def fig_fit(a: AnalyzedLog, passes: list[PassBlips], out_dir: Path) -> Path | None:
    """Figure 2: blip centre against mode number, the fit, and its residuals."""
    if sum(pb.mode.size for pb in passes) < 2:
        return None
    slope, lines = _fit_lines(passes, a.result.get("spacing_steps"))
    fig = _figure(WIDTH_IN * 0.75, 7.0)
    top, bot = fig.subplots(2, 1, sharex=True, height_ratios=[2.2, 1])
    for d, (m, c, line) in sorted(lines.items(), reverse=True):
        colour, word = (UP_COLOUR, "up") if d > 0 else (DOWN_COLOUR, "down")
        order = np.argsort(m)
        top.plot(m, c, "o" if d > 0 else "s", ms=3.5, color=colour, ls="none",
                 label=f"blip centres, {word} passes ({m.size})")
        top.plot(m[order], line[order], "-", color=colour, lw=1, alpha=0.8)
        bot.plot(m, c - line, "o" if d > 0 else "s", ms=3.5, color=colour, ls="none")
    r = a.result
    text = f"fit: spacing = {_pm(r.get('spacing_steps'), r.get('spacing_steps_u'))} steps per mode"
    if r.get("spacing_nm") is not None:
        text += f"\n        = {_pm(r.get('spacing_nm'), r.get('spacing_nm_u'))} nm per mode"
    top.plot([], [], "-", color="0.3", label=text)
    top.legend(loc="best", fontsize=9, framealpha=0.9)
    top.set_ylabel("blip centre (steps)")
    top.set_title("blip centre against mode number", loc="left", fontsize=11)
    top.grid(alpha=0.25)
    res = np.concatenate([c - line for _, c, line in lines.values()])
    rms = float(np.sqrt(np.mean(res ** 2))) if res.size else float("nan")
    bot.axhline(0, color="0.3", lw=0.8)
    bot.set_ylabel("residual (steps)")
    bot.set_xlabel("mode number")
    bot.set_title(f"residuals from the fit (rms {rms:.3g} steps)", loc="left", fontsize=10)
    bot.grid(alpha=0.25)
    k = nm_per_step(r)
    if k:
        ax2 = bot.secondary_yaxis("right", functions=(lambda v: v * k * 1e3, lambda v: v / (k * 1e3)))
        ax2.set_ylabel("residual (pm)")
    return _save(fig, out_dir / "fit.png")


def centre_differences(passes: list[PassBlips]) -> np.ndarray:
    """Distances between neighbouring blip centres within each pass (steps)."""
    parts = [np.diff(np.sort(pb.position_steps)) for pb in passes if pb.position_steps.size > 1]
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
    edges = spacing_bins(d)
    ax.hist(d, bins=edges, color="#5b8db8", edgecolor="white", linewidth=0.5,
            label=f"{d.size} neighbour distances")
    sp = a.result.get("spacing_steps")
    if sp:
        ax.axvline(abs(sp), color=BLIP_COLOUR, lw=1.5,
                   label=f"fitted spacing {_pm(abs(sp), a.result.get('spacing_steps_u'))} steps")
    ax.axvline(float(np.median(d)), color="0.3", ls=":", lw=1.2, label=f"median {np.median(d):.4g} steps")
    ax.set_xlabel("distance between neighbouring blip centres (steps)")
    ax.set_ylabel("count")
    ax.set_title("spread of the mode spacing (within each pass)", loc="left", fontsize=11)
    ax.legend(fontsize=9, framealpha=0.9)
    ax.grid(alpha=0.25)
    k = nm_per_step(a.result)
    if k:
        top = ax.secondary_xaxis("top", functions=(lambda v: v * k, lambda v: v / k))
        top.set_xlabel("distance (nm)")
    return _save(fig, out_dir / "spacings.png")


def backlash_offsets(passes: list[PassBlips]) -> tuple[np.ndarray, np.ndarray]:
    """(mode, mean up centre - mean down centre) for modes seen in both directions."""
    up: dict[int, list[float]] = {}
    down: dict[int, list[float]] = {}
    for pb in passes:
        dst = up if pb.direction > 0 else down
        for m, c in zip(pb.mode.tolist(), pb.position_steps.tolist()):
            dst.setdefault(m, []).append(c)
    both = sorted(set(up) & set(down))
    return (np.array(both, dtype=int),
            np.array([np.mean(up[m]) - np.mean(down[m]) for m in both], dtype=float))


def fig_backlash(a: AnalyzedLog, passes: list[PassBlips], out_dir: Path) -> Path | None:
    """Figure 4: per-mode offset of up against down passes (backlash)."""
    modes, off = backlash_offsets(passes)
    if modes.size == 0:
        return None
    fig = _figure(WIDTH_IN * 0.75, 4.6)
    ax = fig.subplots()
    ax.plot(modes, off, "o", ms=3.5, color="#6a4c93", label=f"{modes.size} modes seen both ways")
    mean = float(np.mean(off))
    ax.axhline(mean, color="0.3", ls=":", lw=1.2, label=f"mean offset {mean:.4g} steps")
    bl = a.result.get("backlash_steps")
    if bl is not None:
        ax.axhline(math.copysign(abs(bl), mean), color=BLIP_COLOUR, lw=1.5,
                   label=f"backlash from the analysis {_pm(bl, a.result.get('backlash_steps_u'))} steps")
    ax.set_xlabel("mode number")
    ax.set_ylabel("centre on up pass \u2212 centre on down pass (steps)")
    ax.set_title("up against down passes: backlash per mode", loc="left", fontsize=11)
    ax.legend(fontsize=9, framealpha=0.9)
    ax.grid(alpha=0.25)
    return _save(fig, out_dir / "backlash.png")


def _pm(v: Any, u: Any) -> str:
    """'46.21 \u00b1 0.12' with the value rounded to the uncertainty's second digit."""
    if v is None:
        return "n/a"
    if u is None or not math.isfinite(u) or u <= 0:
        return f"{v:.6g}"
    digits = max(0, 1 - int(math.floor(math.log10(u))))
    return f"{v:.{digits}f} \u00b1 {u:.{digits}f}"


# --- the uncertainty budget ---------------------------------------------------

def budget_rows(budget: Any) -> list[tuple[str, float, dict]]:
    """(input name, contribution, the raw row) from the analysis budget, largest first.

    The contribution is the row's first numeric column whose name says it is one
    (``contribution``...), else its first numeric column.
    """
    rows = []
    for row in budget or []:
        if not isinstance(row, dict):
            continue
        name = next((str(v) for k, v in row.items() if isinstance(v, str)), "?")
        nums = [(k, v) for k, v in row.items() if isinstance(v, (int, float)) and not isinstance(v, bool)]
        pick = next(((k, v) for k, v in nums if "contrib" in k), nums[0] if nums else None)
        if pick is not None and pick[1] is not None:
            rows.append((name, float(pick[1]), row))
    return sorted(rows, key=lambda r: -abs(r[1]))


def budget_value_key(budget: Any) -> str | None:
    for row in budget or []:
        for k, v in row.items():
            if "contrib" in k and isinstance(v, (int, float)):
                return k
    return None


def fig_budget(a: AnalyzedLog, out_dir: Path) -> Path | None:
    """Figure 5: the uncertainty budget as horizontal bars, largest contribution on top."""
    rows = budget_rows(a.result.get("budget"))
    if not rows:
        return None
    key = budget_value_key(a.result.get("budget")) or "contribution"
    fig = _figure(WIDTH_IN * 0.65, 1.6 + 0.45 * len(rows))
    ax = fig.subplots()
    names = [r[0] for r in rows][::-1]
    vals = [abs(r[1]) for r in rows][::-1]
    bars = ax.barh(names, vals, color="#5b8db8")
    total = sum(v * v for v in vals) ** 0.5
    for b, v in zip(bars, vals):
        share = 100 * v * v / (total * total) if total else 0
        pct = f"{share:.0f} %" if share >= 1 else "< 1 %"
        ax.annotate(f"{v:.3g}  ({pct} of the variance)", (b.get_width(), b.get_y() + b.get_height() / 2),
                    xytext=(4, 0), textcoords="offset points", va="center", fontsize=9)
    ax.set_xlim(0, max(vals) * 1.45)
    unit = _unit_of(key)
    ax.set_xlabel(f"contribution to the standard uncertainty of the chip length ({unit})")
    r = a.result
    ax.set_title(f"uncertainty budget: L = {_pm(r.get('length_um'), r.get('length_um_u'))} \u00b5m (k = 1)",
                 loc="left", fontsize=11)
    ax.grid(alpha=0.25, axis="x")
    return _save(fig, out_dir / "budget.png")


def _unit_of(key: str) -> str:
    for suffix, unit in (("_um", "\u00b5m"), ("_nm", "nm"), ("_steps", "steps"), ("_pct", "%"),
                         ("_percent", "%"), ("_rel", "relative")):
        if key.endswith(suffix):
            return unit
    return "\u00b5m"


# --- the Markdown page -------------------------------------------------------

def _fmt(v: Any) -> str:
    if v is None:
        return "n/a"
    if isinstance(v, float):
        return f"{v:.6g}"
    return str(v)


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
    n_blips = r.get("crossings")
    rows = [("mode spacing in actuator steps", _fmt(r.get("spacing_steps")), _fmt(r.get("spacing_steps_u")),
             f"this log: fit of blip centre against mode number ({_fmt(n_blips)} blips, all passes)")]
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
                     "rig `[counter]` (defaults unless set)"))
    return rows


def write_markdown(a: AnalyzedLog, figures: list[Path], notes: list[str], path: Path) -> Path:
    r, log = a.result, a.log
    passes = pass_directions(a.samples)
    ups = sum(1 for d in passes.values() if d > 0)
    md = [f"# modetick report: {log.path.name}", ""]
    md += ["| run | |", "|---|---|",
           f"| log | `{log.path}` |",
           f"| started / ended (UTC) | {log.meta('started_utc') or 'n/a'} / {log.meta('ended_utc') or 'n/a'} |",
           f"| status | {r.get('status') or 'n/a'}" + (f" ({log.meta('reason')})" if log.meta("reason") else "") + " |",
           f"| samples | {r.get('samples')} in {len(passes)} passes ({ups} up, {len(passes) - ups} down) |",
           f"| program | modetick {log.meta('program_version') or '?'} |", ""]
    md += ["> **Laser safety.** " + SAFETY_TEXT, ""]

    md += ["## Result", "", "| quantity | value | standard uncertainty (k = 1) |", "|---|---|---|",
           f"| modes counted | {_fmt(r.get('modes'))} | |",
           f"| blips seen, all passes | {_fmt(r.get('crossings'))} | |",
           f"| mode spacing | {_fmt(r.get('spacing_steps'))} steps | {_fmt(r.get('spacing_steps_u'))} steps |"]
    if r.get("spacing_nm") is not None:
        md += [f"| mode spacing | {_fmt(r.get('spacing_nm'))} nm | {_fmt(r.get('spacing_nm_u'))} nm |",
               f"| wavelength at the sweep centre | {_fmt(r.get('wavelength_nm'))} nm | {_fmt(r.get('wavelength_nm_u'))} nm |",
               f"| chip length | {_fmt(r.get('length_um'))} \u00b5m | {_fmt(r.get('length_um_u'))} \u00b5m |"]
    if r.get("backlash_steps") is not None:
        md += [f"| backlash | {_fmt(r.get('backlash_steps'))} steps | {_fmt(r.get('backlash_steps_u'))} steps |"]
    md += [""]
    md += [f"- {n}" for n in notes] + ([""] if notes else [])

    md += ["## Inputs and their sources", "",
           f"The rig is {'the one stored in the log' if a.rig_from == 'the log' else '`' + a.rig_from + '`'}"
           f" (rig file `{a.rig.source}`"
           + (", overrides " + ", ".join(f"`{o}`" for o in a.rig.overrides) if a.rig.overrides else "")
           + ").", "",
           "| input | value | standard uncertainty | source |", "|---|---|---|---|"]
    md += [f"| {n} | {v} | {u} | {s} |" for n, v, u, s in _inputs_table(a)]
    md += [""]

    budget = r.get("budget") or []
    if budget:
        cols = list(budget[0].keys())
        md += ["## Uncertainty budget (chip length)", "", "| " + " | ".join(cols) + " |",
               "|" + "---|" * len(cols)]
        md += ["| " + " | ".join(_fmt(row.get(c)) for c in cols) + " |" for row in budget]
        md += [""]

    gaps = r.get("gaps") or []
    warnings = [e for e in a.events if e["kind"] in ("warning", "fault")]
    if gaps or warnings:
        md += ["## Gaps, warnings and faults", ""]
        md += [f"- gap: {_fmt(g)}" for g in gaps]
        md += [f"- {e['kind']} at sample {e['i']}: {e['detail']}" for e in warnings]
        md += [""]

    if figures:
        md += ["## Figures", ""]
        md += [f"![{p.stem}]({p.name})" + "\n" for p in figures]

    md += ["## Rig as used", "", "```toml", rig_toml(a.sections).rstrip(), "```", ""]
    path.write_text("\n".join(md), encoding="utf-8")
    return path


# --- everything ----------------------------------------------------------------

def report_notes(a: AnalyzedLog, passes: list[PassBlips]) -> list[str]:
    notes = []
    if not a.calibrated():
        notes.append("No calibration in the rig (`[stage] deg_per_step`, `[stage] angle_at_zero_deg`, "
                     "`[grating] lines_per_mm`): spacing in actuator steps only, no nm figures, "
                     "no wavelength and no chip length.")
    dirs = {pb.direction for pb in passes}
    if len(dirs) < 2:
        notes.append("The sweep went one way only: no up-against-down (backlash) figure; "
                     "backlash needs at least one up and one down pass.")
    if sum(pb.mode.size for pb in passes) < 2:
        notes.append("Fewer than two blips counted: no fit, spacing or backlash figures.")
    return notes


def write_report(a: AnalyzedLog, out_dir: Path) -> dict:
    """All figures, summary.json and report.md into out_dir; returns what was written."""
    out_dir.mkdir(parents=True, exist_ok=True)
    passes = blips_per_pass(a)
    notes = report_notes(a, passes)
    figures = list(fig_trace(a, passes, out_dir))
    for draw in (fig_fit, fig_spacings, fig_backlash):
        p = draw(a, passes, out_dir)
        if p is not None:
            figures.append(p)
    p = fig_budget(a, out_dir)
    if p is not None:
        figures.append(p)
    elif a.calibrated():
        notes.append("The analysis returned no uncertainty budget: no budget figure.")
    summary = out_dir / "summary.json"
    summary.write_text(json.dumps(a.result, indent=2) + "\n", encoding="utf-8")
    md = write_markdown(a, figures, notes, out_dir / "report.md")
    return {"figures": figures, "summary": summary, "markdown": md, "notes": notes}

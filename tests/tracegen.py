"""Test traces for the analysis, from a model of its own (not the project's simulator).

A grating-tuned Fabry-Perot chip seen through a stepper-driven Littrow mount:
  * chip modes equally spaced in frequency, spacing c / (2 n_g L)
    (Saleh & Teich, Fundamentals of Photonics, resonator modes);
  * grating angle = angle_at_zero + deg_per_step * mechanical position, and
    Littrow m * lambda = 2 d sin(theta) (Palmer, Diffraction Grating Handbook),
    so the spacing in steps changes along a wide sweep, as on a real bench;
  * the mount has play (a dead band: the backlash) and stick-slip (brief slips
    back, lag-then-catch-up); the detector has a time constant, white and 1/f
    noise, drift, single-sample spikes, an ADC and a saturation level.

Every number here is invented for tests; nothing is taken from a bench.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field, replace

import numpy as np

C_NM_THZ = 299_792.458   # speed of light in nm * THz


@dataclass
class Spec:
    seed: int = 0
    n_modes: int = 100             # modes inside the sweep
    spacing_steps: float = 40.0    # spacing at the middle of the sweep, mechanical steps
    reads_per_step: int = 1
    passes: int = 1                # 1 = one way; more alternate direction
    downward: bool = False         # first pass goes toward lower step numbers
    backlash_steps: float = 0.0    # total play of the mount (dead band after a reversal)
    width_frac: float = 0.08       # blip FWHM / spacing
    shape: str = "lorentz"         # "lorentz" | "gauss"
    snr: float = 40.0              # blip height at the gain peak / total noise sigma
    edge_height: float = 0.6       # relative blip height at the ends of the sweep
    pink_frac: float = 0.0         # share of the noise variance that is 1/f
    drift: float = 0.0             # baseline drift over the run, in peak blip heights
    baseline: float = 3.0          # spontaneous-emission level, in peak blip heights
    spike_rate: float = 0.0        # single-sample spikes per sample
    spike_size: float = 3.0        # spike height in peak blip heights (uniform 0.5x-1.5x)
    negative_spikes: bool = False
    split_depth: float = 0.0       # external-cavity modulation depth inside a blip (0..1)
    ext_ratio: float = 0.1         # external-cavity mode spacing / chip mode spacing
    kick_rate: float = 0.0         # brief slips back per mechanical step
    kick_frac: float = 0.4         # size of a slip back, in spacings
    stick_rate: float = 0.0        # lag-then-catch-up events per step
    short_reversals: int = 0       # brief reversals inside each pass
    short_reversal_steps: tuple = (10, 60)
    adc_bits: int = 0              # 0 = no quantisation
    clip_frac: float = 0.0         # saturate this far above baseline, in peak blip heights (0 = none)
    tau_samples: float = 0.0       # detector time constant
    margin_spacings: float = 1.5   # sweep extends this far past the first/last mode
    # calibration of the imaginary bench
    wavelength_nm: float = 0.0     # 0 = pick one from the seed
    lines_per_mm: float = 0.0
    group_index: float = 0.0
    deg_per_step_u_rel: float = 0.01
    angle_at_zero_u_deg: float = 0.02
    group_index_u: float = 0.04
    lines_per_mm_u: float = 0.0
    cal_error_sigmas: float = 0.0  # rig calibration = truth + this x N(0, u) per input (0 = exact)
    drop_modes: tuple = ()         # indices (among the modes in the sweep) given no blip at all


@dataclass
class Trace:
    position: np.ndarray      # commanded steps per sample
    direction: np.ndarray     # commanded direction per sample
    value: np.ndarray
    actual: np.ndarray        # mechanical position per sample (truth)
    spec: Spec
    sections: dict            # rig sections as the analysis would get them
    truth: dict = field(default_factory=dict)


def _pink(n: int, rng: np.random.Generator) -> np.ndarray:
    """Unit-variance 1/f noise by spectral shaping of white noise."""
    w = rng.normal(size=n)
    f = np.fft.rfftfreq(n)
    f[0] = f[1] if n > 1 else 1.0
    y = np.fft.irfft(np.fft.rfft(w) / np.sqrt(f), n)
    y -= y.mean()
    return y / (y.std() or 1.0)


def _commanded(spec: Spec, lo: int, hi: int, rng) -> tuple[np.ndarray, np.ndarray]:
    """Commanded step positions (one per read) for all passes, with short reversals."""
    legs = []
    up = not spec.downward
    for _ in range(spec.passes):
        a, b = (lo, hi) if up else (hi, lo)
        s = 1 if up else -1
        path = np.arange(a, b + s, s)
        if spec.short_reversals:
            cuts = np.sort(rng.choice(np.arange(len(path) // 10, len(path) * 9 // 10),
                                      spec.short_reversals, replace=False))
            pieces, last = [], 0
            for c in cuts:
                pieces.append(path[last:c])
                back = int(rng.integers(*spec.short_reversal_steps))
                p0 = path[c - 1] if c > 0 else path[0]
                pieces.append(p0 - s * np.arange(1, back + 1))
                pieces.append(p0 - s * np.arange(back - 1, 0, -1))
                last = c
            pieces.append(path[last:])
            path = np.concatenate(pieces)
        legs.append(path)
        up = not up
    pos = np.concatenate(legs).astype(float)
    pos = np.repeat(pos, spec.reads_per_step)
    step = np.diff(pos, prepend=pos[0])
    d = np.sign(step)
    first = d[np.flatnonzero(d)[0]] if d.any() else 1
    d[0] = first
    idx = np.where(d != 0, np.arange(d.size), 0)
    np.maximum.accumulate(idx, out=idx)
    return pos, d[idx].astype(int)


def _mechanics(spec: Spec, c: np.ndarray, d: np.ndarray, S: float, rng) -> np.ndarray:
    """Mechanical position: play of spec.backlash_steps, slips back, stick then catch up."""
    half = spec.backlash_steps / 2
    a = np.empty_like(c)
    cur = c[0] - d[0] * half
    for i in range(c.size):     # play operator: the mount moves only when pushed
        if c[i] - half > cur:
            cur = c[i] - half
        elif c[i] + half < cur:
            cur = c[i] + half
        a[i] = cur
    n = c.size
    off = np.zeros(n)
    per_sample = 1.0 / spec.reads_per_step
    if spec.kick_rate:
        nk = rng.poisson(spec.kick_rate * n * per_sample)
        for i in rng.integers(50, n - 50, size=nk):
            size = spec.kick_frac * S * rng.uniform(0.5, 1.3)
            rec = int(rng.integers(2, 12)) * spec.reads_per_step
            prof = size * (1 - np.arange(rec) / rec)
            off[i:i + rec] -= d[i] * prof[:max(0, min(rec, n - i))]
    if spec.stick_rate:
        ns = rng.poisson(spec.stick_rate * n * per_sample)
        for i in rng.integers(50, n - 50, size=ns):
            lag = int(rng.integers(2, 6)) * spec.reads_per_step
            seg = slice(i, min(n, i + lag))
            off[seg] += a[i] - a[seg]            # hold still, then jump back on track
    return a + off


def make_trace(spec: Spec) -> Trace:
    rng = np.random.default_rng(spec.seed)
    # --- the imaginary bench
    lam0 = spec.wavelength_nm or float(rng.uniform(760, 1080))
    lpm = spec.lines_per_mm or float(rng.choice([1200.0, 1500.0, 1800.0]))
    d_nm = 1e6 / lpm
    if lam0 / (2 * d_nm) > 0.93:          # keep Littrow below grazing
        lpm = 1200.0
        d_nm = 1e6 / lpm
    n_g = spec.group_index or float(rng.uniform(3.4, 4.0))
    L_um = float(rng.uniform(300, 1500))
    dnu = C_NM_THZ / (2 * n_g * L_um * 1e3)        # THz
    theta0 = math.asin(lam0 / (2 * d_nm))
    dlam_dtheta = 2 * d_nm * math.cos(theta0)       # nm/rad, order 1
    dlam = lam0 ** 2 * dnu / C_NM_THZ               # nm
    deg_per_step = math.degrees(dlam / dlam_dtheta / spec.spacing_steps)
    angle_at_zero = math.degrees(theta0) - deg_per_step * 20000.0   # sweep centred near 20000 steps

    def pos_of_lambda(lam):
        return (np.degrees(np.arcsin(lam / (2 * d_nm))) - angle_at_zero) / deg_per_step

    nu0 = C_NM_THZ / lam0
    half_n = spec.n_modes / 2
    ks = np.arange(-int(half_n) - 6, int(half_n) + 7)
    # a random sub-spacing offset so mode centres do not sit on whole steps
    nu_k = nu0 + (ks + rng.uniform(-0.5, 0.5)) * dnu
    a_k = pos_of_lambda(C_NM_THZ / nu_k)
    order = np.argsort(a_k)
    a_k, nu_k = a_k[order], nu_k[order]
    inside = np.argsort(np.abs(a_k - 20000.0))[:spec.n_modes]
    first, last = a_k[inside].min(), a_k[inside].max()
    S_mid = spec.spacing_steps
    lo = int(math.floor(first - spec.margin_spacings * S_mid))
    hi = int(math.ceil(last + spec.margin_spacings * S_mid))
    # --- motion
    c, d = _commanded(spec, lo, hi, rng)
    act = _mechanics(spec, c, d, S_mid, rng)
    # --- optics: blips at the modes, gain envelope in wavelength, spontaneous baseline
    span = last - first
    centre = 0.5 * (first + last)
    sig_env = (span / 2) / math.sqrt(2 * math.log(1 / spec.edge_height)) if spec.edge_height < 1 else np.inf
    heights = np.exp(-0.5 * ((a_k - centre) / sig_env) ** 2)
    if spec.drop_modes:
        in_sweep = np.sort(inside)
        heights[in_sweep[list(spec.drop_modes)]] = 0.0
    fwhm = spec.width_frac * S_mid
    env_w = max(fwhm, 0.5)
    reach = (40 if spec.shape == "lorentz" else 5) * env_w

    def blips(pos: np.ndarray) -> np.ndarray:
        out = np.zeros(pos.size)
        for ak, hk in zip(a_k, heights):
            sel = np.flatnonzero(np.abs(pos - ak) < reach)
            if sel.size == 0:
                continue
            u = (pos[sel] - ak) / env_w
            if spec.shape == "gauss":
                prof = np.exp(-4 * math.log(2) * u ** 2)
            else:
                prof = 1.0 / (1.0 + 4 * u ** 2)
            if spec.split_depth:
                # external-cavity modes under the chip mode: 2-3 sub-peaks per blip
                s_ext = spec.ext_ratio * S_mid
                mod = (1 - spec.split_depth
                       + spec.split_depth * np.cos(math.pi * (pos[sel] - 0.37 * s_ext) / s_ext) ** 2)
                prof = prof * mod / (1 - spec.split_depth / 2)
            out[sel] += hk * prof
        return out

    sig = blips(act)
    base = spec.baseline * np.exp(-0.5 * ((act - centre) / (3 * span)) ** 2)
    t = np.linspace(0, 1, act.size)
    phase = rng.uniform(0, 2 * math.pi)
    drift = spec.drift * (0.6 * t + 0.4 * np.sin(2 * math.pi * 1.3 * t + phase))
    clean = base + drift + sig
    if spec.tau_samples:
        from scipy.signal import lfilter
        a = math.exp(-1 / spec.tau_samples)
        clean = lfilter([1 - a], [1, -a], clean, zi=[clean[0] * a])[0]
    sigma = 1.0 / spec.snr
    white = rng.normal(size=act.size) * sigma * math.sqrt(1 - spec.pink_frac)
    pink = _pink(act.size, rng) * sigma * math.sqrt(spec.pink_frac) if spec.pink_frac else 0.0
    v = clean + white + pink
    if spec.spike_rate:
        k = rng.random(act.size) < spec.spike_rate
        size = spec.spike_size * rng.uniform(0.5, 1.5, k.sum())
        if spec.negative_spikes:
            size *= rng.choice([-1, 1], k.sum())
        v[k] += size
    if spec.clip_frac:
        # the detector saturates above the highest baseline, cutting blip tops only
        v = np.minimum(v, float(np.max(base + drift)) + spec.clip_frac)
    if spec.adc_bits:
        lo_v, hi_v = v.min() - 0.05, v.max() + 0.05
        lsb = (hi_v - lo_v) / (2 ** spec.adc_bits)
        v = lo_v + np.floor((v - lo_v) / lsb) * lsb
    # --- truth
    crossed_lo, crossed_hi = act.min(), act.max()
    crossed = (a_k > crossed_lo + 0.5 * fwhm) & (a_k < crossed_hi - 0.5 * fwhm)
    # detectable: prominence of each blip in the noise-free profile (peak above the
    # higher of the two troughs towards its neighbours), on a fine grid
    grid = np.arange(crossed_lo, crossed_hi, min(0.1, fwhm / 20))
    prof = blips(grid) + spec.baseline * np.exp(-0.5 * ((grid - centre) / (3 * span)) ** 2)
    if spec.clip_frac:
        prof = np.minimum(prof, float(np.median(prof)) + spec.clip_frac)
    prom = np.zeros(a_k.size)
    for i in np.flatnonzero(crossed):
        lo_e = a_k[i - 1] if i > 0 else crossed_lo
        hi_e = a_k[i + 1] if i + 1 < a_k.size else crossed_hi
        near = np.abs(grid - a_k[i]) < max(0.3 * S_mid, fwhm)
        left = (grid >= lo_e) & (grid <= a_k[i])
        right = (grid >= a_k[i]) & (grid <= hi_e)
        if near.any() and left.any() and right.any():
            prom[i] = prof[near].max() - max(prof[left].min(), prof[right].min())
    prom_snr = prom * spec.snr
    strong = crossed & (prom_snr >= 8.0)
    dropped = np.zeros(a_k.size, bool)
    if spec.drop_modes:
        dropped[np.sort(inside)[list(spec.drop_modes)]] = True
    weak = crossed & (prom_snr >= 2.5)
    crossed_idx = np.flatnonzero(crossed)
    k_mid = 0.5 * (crossed_idx.min() + crossed_idx.max())
    # spacing at the middle of the counted range: derivative of the position of a
    # fractional mode number, evaluated from the same frequency comb
    nu_mid = np.interp(k_mid, np.arange(nu_k.size), nu_k)
    step_nu = nu_k[1] - nu_k[0]
    a_p = pos_of_lambda(C_NM_THZ / (nu_mid + step_nu / 2))
    a_m = pos_of_lambda(C_NM_THZ / (nu_mid - step_nu / 2))
    spacing_true = float(abs(a_p - a_m))
    lam_mid = C_NM_THZ / nu_mid
    spacing_nm_true = lam_mid ** 2 * dnu / C_NM_THZ
    # rig calibration (optionally off the truth by a chosen number of sigmas)
    dps_u = abs(deg_per_step) * spec.deg_per_step_u_rel
    cal = {"deg_per_step": deg_per_step, "angle_at_zero_deg": angle_at_zero,
           "lines_per_mm": lpm, "group_index": n_g}
    if spec.cal_error_sigmas:
        # the rig's values are what a calibration with these uncertainties gave
        z = spec.cal_error_sigmas * np.random.default_rng(spec.seed + 10_000).normal(size=4)
        cal = {"deg_per_step": deg_per_step + z[0] * dps_u,
               "angle_at_zero_deg": angle_at_zero + z[1] * spec.angle_at_zero_u_deg,
               "lines_per_mm": lpm + z[2] * spec.lines_per_mm_u,
               "group_index": n_g + z[3] * spec.group_index_u}
    sections = {
        "stage": {"deg_per_step": cal["deg_per_step"], "deg_per_step_u": dps_u,
                  "angle_at_zero_deg": cal["angle_at_zero_deg"],
                  "angle_at_zero_deg_u": spec.angle_at_zero_u_deg},
        "grating": {"lines_per_mm": cal["lines_per_mm"], "lines_per_mm_u": spec.lines_per_mm_u,
                    "order": 1},
        "chip": {"group_index": cal["group_index"], "group_index_u": spec.group_index_u},
    }
    # the upper end of the band: every mode with any visible part inside the travel
    partly = (a_k > crossed_lo - fwhm) & (a_k < crossed_hi + fwhm)
    truth = {"modes_all": int((weak | (partly & ~crossed)).sum()), "modes_strong": int(strong.sum()),
             "modes_crossed": int(crossed.sum()), "spacing_steps": spacing_true,
             "spacing_nm": spacing_nm_true, "length_um": L_um, "wavelength_nm": lam_mid,
             "group_index": n_g, "backlash_steps": spec.backlash_steps, "mode_positions": a_k[crossed],
             "dropped_positions": a_k[dropped],
             "noise_sigma": sigma}
    return Trace(position=c, direction=d, value=v, actual=act, spec=spec, sections=sections,
                 truth=truth)


def hard_cases() -> dict[str, Spec]:
    """The hard cases of the acceptance bar, one Spec each (seed set by the caller)."""
    base = Spec()
    return {
        "clean-40": replace(base, spacing_steps=40, snr=60),
        "clean-120": replace(base, spacing_steps=120, snr=60),
        "narrow-spikes-40": replace(base, spacing_steps=40, width_frac=0.06, snr=12, shape="gauss"),
        "wide-bumps-40": replace(base, spacing_steps=40, width_frac=0.8, snr=25, shape="gauss",
                                 edge_height=0.8),
        "wide-bumps-120": replace(base, spacing_steps=120, width_frac=0.7, snr=20, edge_height=0.8),
        "snr9-40": replace(base, spacing_steps=40, snr=11, width_frac=0.12, edge_height=0.85),
        "snr9-120": replace(base, spacing_steps=120, snr=11, width_frac=0.1, edge_height=0.85),
        "pink-drift-40": replace(base, spacing_steps=40, snr=14, pink_frac=0.5, drift=1.5,
                                 width_frac=0.12),
        "pink-drift-120": replace(base, spacing_steps=120, snr=14, pink_frac=0.5, drift=2.0,
                                  width_frac=0.1),
        "spikes-40": replace(base, spacing_steps=40, snr=20, spike_rate=3e-3, spike_size=3.0,
                             negative_spikes=True),
        "split-40": replace(base, spacing_steps=40, width_frac=0.3, split_depth=0.9,
                            ext_ratio=0.12, snr=25),
        "split-120": replace(base, spacing_steps=120, width_frac=0.2, split_depth=0.9,
                             ext_ratio=0.08, snr=25),
        "kicks-40": replace(base, spacing_steps=40, kick_rate=4e-3, kick_frac=0.5, snr=25),
        "kicks-120": replace(base, spacing_steps=120, kick_rate=2e-3, kick_frac=0.4, snr=25,
                             stick_rate=1e-3),
        "updown-backlash-40": replace(base, spacing_steps=40, passes=4, backlash_steps=30, snr=20,
                                      tau_samples=0.7),
        "updown-backlash-120": replace(base, spacing_steps=120, passes=3, backlash_steps=45, snr=20),
        "short-reversals-40": replace(base, spacing_steps=40, passes=2, backlash_steps=20,
                                      short_reversals=4, short_reversal_steps=(15, 90), snr=20),
        "downward-120": replace(base, spacing_steps=120, downward=True, snr=20),
        "adc12-40": replace(base, spacing_steps=40, adc_bits=12, snr=30, baseline=40.0),
        "clipped-40": replace(base, spacing_steps=40, clip_frac=0.6, snr=30, width_frac=0.15),
        "reads3-120": replace(base, spacing_steps=120, reads_per_step=3, snr=15, width_frac=0.05),
        "everything-40": replace(base, spacing_steps=40, passes=2, backlash_steps=25, snr=12,
                                 pink_frac=0.4, drift=1.0, spike_rate=1e-3, split_depth=0.7,
                                 width_frac=0.25, kick_rate=2e-3, adc_bits=12, clip_frac=0.8,
                                 short_reversals=2, edge_height=0.8),
    }

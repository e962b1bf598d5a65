"""Calibration and laser physics: steps -> angle -> Littrow wavelength -> mode spacing -> chip length.

Relations (standard sources):
* Littrow grating equation, order m, groove spacing d: m*lambda = 2*d*sin(theta)
  (Palmer, Diffraction Grating Handbook).
* Tuning rate in Littrow: d(lambda)/d(theta) = 2*d*cos(theta)/m (same source).
* Chip mode spacing (free spectral range): delta_lambda = lambda^2 / (2*n_g*L),
  with the group index n_g, not the phase index (Saleh & Teich, Fundamentals
  of Photonics; Coldren, Corzine & Mashanovitch, Diode Lasers and Photonic
  Integrated Circuits). Hence L = lambda^2 / (2*n_g*delta_lambda).

Units: steps, degrees, lines per mm, nm, um, GHz. The stage calibration is linear:
angle_deg = angle_at_zero_deg + deg_per_step * steps, for the stage moving the way it
moved when calibrated ([stage] calibrated_moving).

Wavelengths are those the grating equation gives, in the air around the grating;
vacuum wavelengths are n_air (~1.00027) times longer, and a length from air values
is low by the same ~0.03 %, well inside the uncertainties here. The inputs are taken
as uncorrelated (an angle offset and a step size fitted together are correlated in
fact; the budget does not model that). The forward chain takes
floats or numpy arrays alike (the Monte Carlo check evaluates it on arrays).
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class Calibration:
    """The rig keys that turn steps into wavelength, with standard uncertainties."""

    deg_per_step: float
    angle_at_zero_deg: float
    lines_per_mm: float
    order: int = 1
    deg_per_step_u: float = 0.0
    angle_at_zero_deg_u: float = 0.0
    lines_per_mm_u: float = 0.0
    moving: str = "up"          # the direction the stage moved when it was calibrated

    def calibrated_position(self, mechanical_steps: float, backlash_steps: float | None) -> float:
        """Where the stage reads, moving as it did when calibrated, at a mechanical centre
        (the mean of up and down, mechanical_centres): half the backlash up or down."""
        if not backlash_steps:
            return mechanical_steps
        return mechanical_steps + (0.5 if self.moving == "up" else -0.5) * backlash_steps

    @classmethod
    def from_sections(cls, sections: dict | None) -> "Calibration | None":
        """From a rig's sections; None when any calibration key is missing."""
        if not sections:
            return None
        st, g = sections.get("stage", {}), sections.get("grating", {})
        need = (st.get("deg_per_step"), st.get("angle_at_zero_deg"), g.get("lines_per_mm"))
        if any(v is None for v in need):
            return None
        return cls(float(need[0]), float(need[1]), float(need[2]), int(g.get("order", 1) or 1),
                   float(st.get("deg_per_step_u", 0.0) or 0.0),
                   float(st.get("angle_at_zero_deg_u", 0.0) or 0.0),
                   float(g.get("lines_per_mm_u", 0.0) or 0.0), str(st.get("calibrated_moving") or "up"))


def groove_spacing_nm(lines_per_mm: float) -> float:
    return 1e6 / lines_per_mm


def angle_deg(steps: float, deg_per_step: float, angle_at_zero_deg: float) -> float:
    return angle_at_zero_deg + deg_per_step * steps


def littrow_wavelength_nm(angle_deg: float, lines_per_mm: float, order: int = 1) -> float:
    """m*lambda = 2*d*sin(theta), theta in degrees (Palmer)."""
    return 2.0 * groove_spacing_nm(lines_per_mm) * np.sin(np.radians(angle_deg)) / order


def littrow_angle_deg(wavelength_nm: float, lines_per_mm: float, order: int = 1) -> float:
    s = order * wavelength_nm / (2.0 * groove_spacing_nm(lines_per_mm))
    if not -1.0 <= s <= 1.0:
        raise ValueError(f"no Littrow angle: {wavelength_nm} nm in order {order} needs sin(theta) = {s:.3f}")
    return math.degrees(math.asin(s))


def tuning_nm_per_deg(angle_deg: float, lines_per_mm: float, order: int = 1) -> float:
    """d(lambda)/d(theta) = 2*d*cos(theta)/m, per degree (Palmer)."""
    return 2.0 * groove_spacing_nm(lines_per_mm) * math.cos(math.radians(angle_deg)) / order * math.pi / 180.0


def spacing_nm_at(spacing_steps: float, centre_steps: float, deg_per_step: float, angle_at_zero_deg: float,
                  lines_per_mm: float, order: int = 1) -> tuple[float, float]:
    """(mode spacing in nm, wavelength in nm) at centre_steps.

    The spacing is the wavelength difference across one spacing centred on
    centre_steps (exact for the linear stage, no small-angle step).
    """
    half = 0.5 * spacing_steps
    lam = lambda s: littrow_wavelength_nm(angle_deg(s, deg_per_step, angle_at_zero_deg), lines_per_mm, order)  # noqa: E731
    return np.abs(lam(centre_steps + half) - lam(centre_steps - half)), lam(centre_steps)


def chip_length_um(wavelength_nm: float, spacing_nm: float, group_index: float) -> float:
    """L = lambda^2 / (2 * n_g * delta_lambda) (Coldren et al.; Saleh & Teich), in um."""
    return wavelength_nm ** 2 / (2.0 * group_index * spacing_nm) / 1000.0


def length_from_steps(spacing_steps: float, centre_steps: float, deg_per_step: float, angle_at_zero_deg: float,
                      lines_per_mm: float, group_index: float, order: int = 1) -> float:
    """The whole chain as one function of its inputs (what the uncertainty propagates)."""
    sp_nm, lam = spacing_nm_at(spacing_steps, centre_steps, deg_per_step, angle_at_zero_deg, lines_per_mm, order)
    return chip_length_um(lam, sp_nm, group_index)


def chain_inputs(cal: Calibration, spacing_steps: float, spacing_u: float, centre_steps: float,
                 group_index: float, group_index_u: float = 0.0):
    """The inputs of length_from_steps (in its argument order) with their standard
    uncertainties, named as the budget shows them."""
    from analysis.uncertainty import Input
    return [Input("spacing_steps (fit)", spacing_steps, spacing_u, "slope of mode centre vs mode number"),
            Input("centre_steps", centre_steps, 0.0, "centre of the counted range"),
            *_rig_inputs(cal, group_index, group_index_u)]


def _rig_inputs(cal: Calibration, group_index: float, group_index_u: float):
    """The rig file's inputs to the chain: step size, angle offset, groove density, n_g."""
    from analysis.uncertainty import Input
    return [Input("[stage] deg_per_step", cal.deg_per_step, cal.deg_per_step_u, "rig file"),
            Input("[stage] angle_at_zero_deg", cal.angle_at_zero_deg, cal.angle_at_zero_deg_u, "rig file"),
            Input("[grating] lines_per_mm", cal.lines_per_mm, cal.lines_per_mm_u, "rig file"),
            Input("[chip] group_index", group_index, group_index_u, "rig file")]


C_M_PER_S = 299_792_458.0   # speed of light in vacuum (SI, exact)


def spacing_ghz(spacing_nm: float, wavelength_nm: float) -> float:
    """Mode spacing in frequency: delta_nu = c * delta_lambda / lambda^2, in GHz (with both
    wavelengths in air, as the grating gives them, this is high by n_air - 1 ~ 2.7e-4)."""
    return C_M_PER_S * spacing_nm / wavelength_nm ** 2


def calibrated_figures(cal: Calibration, spacing_steps: float, spacing_u: float, centre_steps: float,
                       group_index: float | None, group_index_u: float = 0.0) -> dict:
    """Spacing in nm and GHz, wavelength and chip length at centre_steps, each with its
    GUM uncertainty from every input (the angle offset and the groove density too: at high
    Littrow angles they weigh as much as the spacing), and the length's budget."""
    from analysis.uncertainty import gum
    order = cal.order
    inputs = chain_inputs(cal, spacing_steps, spacing_u, centre_steps,
                          float(group_index) if group_index else 1.0, group_index_u)

    def nm(sp, c, k, a0, lpm, g):
        return spacing_nm_at(sp, c, k, a0, lpm, order)[0]

    def lam(sp, c, k, a0, lpm, g):
        return littrow_wavelength_nm(a0 + k * c, lpm, order)

    def ghz(*x):
        return spacing_ghz(nm(*x), lam(*x))

    out = {}
    for key, f in (("spacing_nm", nm), ("wavelength_nm", lam), ("spacing_ghz", ghz)):
        y, u, _ = gum(f, inputs)
        out[key], out[f"{key}_u"] = float(y), u
    out["length_um"] = out["length_um_u"] = out["budget"] = None
    if group_index:
        L, L_u, budget = gum(lambda *x: length_from_steps(*x, order), inputs)
        out.update(length_um=float(L), length_um_u=L_u, budget=budget)
    return out


def live_calibration(spacing_steps: float | None, spacing_steps_u: float | None, sections: dict,
                     centre_steps: float | None = None, backlash_steps: float | None = None) -> dict | None:
    """calibrated_figures for the dashboard and the counter's own summary, from a rig's
    sections (None when uncalibrated), at the mechanical centre_steps (mid-sweep if None);
    the offline analysis adds the Monte Carlo check."""
    cal = Calibration.from_sections(sections)
    if cal is None or not spacing_steps:
        return None
    if centre_steps is None:
        sw = sections.get("sweep", {})
        centre_steps = 0.5 * (sw.get("start", 0) + sw.get("stop", 0))
    else:
        centre_steps = cal.calibrated_position(centre_steps, backlash_steps)
    chip = sections.get("chip", {})
    return calibrated_figures(cal, spacing_steps, spacing_steps_u or 0.0, centre_steps,
                              chip.get("group_index"), float(chip.get("group_index_u") or 0.0))


def length_by_count(n_modes: int, span_nm: float, wavelength_nm: float, group_index: float,
                    span_nm_u: float = 0.0, wavelength_nm_u: float = 0.0,
                    group_index_u: float = 0.0) -> dict:
    """The by-count route: n_modes whose centres span span_nm around wavelength_nm.

    For a rig without a stage calibration (span and wavelength then come from
    elsewhere, e.g. a wavemeter reading at the first and the last mode):
    delta_lambda = W / (N - 1), L = lambda^2 / (2 n_g delta_lambda), with the
    GUM uncertainty of L from those of W, lambda and n_g (N is exact).
    """
    from analysis.uncertainty import Input, gum
    if n_modes < 2:
        raise ValueError("a count needs at least 2 modes to span anything")
    if span_nm <= 0:
        raise ValueError(f"the span must be positive, got {span_nm} nm")
    intervals = n_modes - 1

    def length(w, lam, ng):
        return chip_length_um(lam, w / intervals, ng)

    L, L_u, budget = gum(length, [Input("span_nm", span_nm, span_nm_u, "first to last mode centre"),
                                  Input("wavelength_nm", wavelength_nm, wavelength_nm_u, ""),
                                  Input("[chip] group_index", group_index, group_index_u, "rig file")])
    return {"modes": int(n_modes), "span_nm": float(span_nm), "spacing_nm": span_nm / intervals,
            "length_um": L, "length_um_u": L_u, "budget": budget}


def length_by_count_steps(n_modes: int, first_steps: float, last_steps: float, end_u_steps: float,
                          cal: Calibration, group_index: float, group_index_u: float = 0.0) -> dict:
    """The by-count route on a calibrated stage: n_modes whose centres lie from first_steps
    to last_steps (each end uncertain by end_u_steps), through the Littrow chain; the GUM
    uncertainty of L carries the end centres and every calibration input."""
    from analysis.uncertainty import Input, gum
    if n_modes < 2:
        raise ValueError("a count needs at least 2 modes to span anything")
    intervals = n_modes - 1
    order = cal.order

    def ends(c0, c1, k, a0, lpm):
        return (littrow_wavelength_nm(a0 + k * c0, lpm, order), littrow_wavelength_nm(a0 + k * c1, lpm, order))

    def length(c0, c1, k, a0, lpm, ng):
        l0, l1 = ends(c0, c1, k, a0, lpm)
        return chip_length_um(0.5 * (l0 + l1), np.abs(l1 - l0) / intervals, ng)

    inputs = [Input("first mode centre (steps)", first_steps, end_u_steps, "fit residual rms"),
              Input("last mode centre (steps)", last_steps, end_u_steps, "fit residual rms"),
              *_rig_inputs(cal, group_index, group_index_u)]
    l0, l1 = ends(first_steps, last_steps, cal.deg_per_step, cal.angle_at_zero_deg, cal.lines_per_mm)
    span_nm = float(abs(l1 - l0))
    L, L_u, budget = gum(length, inputs)
    return {"modes": int(n_modes), "span_nm": span_nm, "spacing_nm": span_nm / intervals,
            "wavelength_nm": float(0.5 * (l0 + l1)), "length_um": float(L), "length_um_u": L_u,
            "budget": budget}

"""The simulated external-cavity diode laser: one model, evaluated per step or per sweep.

Output seen by the detector when the grating sits at position x (steps) and
the chip is dT kelvin off its start temperature:

  theta = lever(x)                                     mechanics.Lever
  lambda_g = 2 d sin(theta) / m                        Littrow feedback (Palmer)
  M = 2 n(lambda_g) L (1 + a_T dT) / lambda_g          chip mode number: round-trip
                                                       phase phi = 2 pi M (modes at integer M)
  g = exp(-4 ln2 ((lambda_g - lambda_gain(dT)) / FWHM)^2)       gain envelope
  h = g * edge(lambda_g - lambda_lo) * edge(lambda_hi - lambda_g) lasing range
  r = R_facet + (R_lasing - R_facet) h                 effective reflectance
  blip = 1 / (1 + 4r/(1-r)^2 sin^2(pi M))              Airy (Hecht)
  ext = 1 - c + c / (1 + 4R_e/(1-R_e)^2 sin^2(2 pi L_ext / lambda_g))
                                                       external-cavity structure
  P = dark + spont (0.85 + 0.15 g) + (1 - k_T dT)(A_las h + A_sub g) blip ext

n(lambda) is the chip's dispersion (sims.dispersion), so the mode spacing
follows the group index: lambda^2 / (2 n_g L). With temperature the gain
peak moves by gain_shift_nm_per_K and the modes by mode_shift_nm_per_K; for a
mode at fixed order q, d lambda / lambda = a_T dT n / n_g, which fixes a_T.

Every formula takes ``xp`` (``math`` for scalars, ``numpy`` for arrays) so
the step-by-step bench and the vectorized trace evaluate the same code.
"""
from __future__ import annotations

import math
from typing import Any


from sims import optics
from sims.camera import CameraModel
from sims.dispersion import single_oscillator
from sims.mechanics import KickSites, Lever
from sims.scenarios import check_params, resolve_params
from sims.signal_chain import STREAM_KICKS, STREAM_PHASES, Adc, stream

FOUR_LN2 = 4.0 * math.log(2.0)


class SimModel:
    """Physics of one simulated rig, built from the validated rig sections."""

    def __init__(self, sections: dict[str, dict[str, Any]]):
        p = resolve_params(sections.get("sim", {}))
        errors = check_params(p)
        if errors:
            key, msg = errors[0]
            raise ValueError(f"[sim] {key}: {msg}")
        self.params = p
        self.seed = p["seed"]
        stage, grating = sections["stage"], sections["grating"]
        self.sweep = sections["sweep"]
        self.reads_per_step = sections["detector"]["reads_per_step"]

        deg_per_step = _first(p["true_deg_per_step"], stage.get("deg_per_step"))
        angle0 = _first(p["true_angle_at_zero_deg"], stage.get("angle_at_zero_deg"))
        lines = _first(p["true_lines_per_mm"], grating.get("lines_per_mm"))
        missing = [name for name, v in (("deg_per_step", deg_per_step), ("angle_at_zero_deg", angle0),
                                        ("lines_per_mm", lines)) if v is None]
        if missing:
            raise ValueError("the simulated rig needs " + ", ".join(missing)
                             + " in [stage]/[grating] (or [sim] true_" + missing[0] + ")")
        self.lever = Lever(p["lever_arm"], deg_per_step, angle0, p["lever_perpendicular_steps"])
        self.lever.check_reach(p["travel_min_steps"], p["travel_max_steps"])
        self.lines_per_mm = lines
        self.order = grating["order"]
        self.two_d_over_m = 2.0 * optics.groove_spacing_nm(lines) / self.order

        disp = single_oscillator(p["phase_index"], p["group_index"], p["index_ref_nm"])
        self.dispersion = disp
        (self.osc_b, self.osc_c_um2), = disp.terms
        self.length_nm = p["chip_length_um"] * 1e3
        lam_ref = p["index_ref_nm"]
        self.alpha_per_K = p["mode_shift_nm_per_K"] * p["group_index"] / (lam_ref * p["phase_index"])

        self.gain_centre = p["gain_centre_nm"]
        self.gain_shift = p["gain_shift_nm_per_K"]
        self.inv_fwhm = 1.0 / p["gain_fwhm_nm"]
        self.half_range = p["lasing_halfwidth_nm"]
        self.inv_2edge = 1.0 / (2.0 * p["lasing_edge_nm"])
        self.r_sub = p["facet_reflectance"]
        self.r_gain = p["lasing_reflectance"] - p["facet_reflectance"]
        self.a_las, self.a_sub = p["blip_height_v"], p["subthreshold_height_v"]
        self.spont, self.dark = p["spont_level_v"], p["dark_offset_v"]
        self.ext_c = p["ext_contrast"]
        self.ext_coef = optics.finesse_coefficient(p["ext_reflectance"])
        self.two_lext_nm = 2.0 * p["ext_cavity_mm"] * 1e6
        self.power_drop = p["power_drop_per_K"]

        phases = stream(self.seed, STREAM_PHASES).uniform(0.0, 2.0 * math.pi, 2)
        self.temp_phase, self.offset_phase = float(phases[0]), float(phases[1])
        self.temp_ramp, self.temp_wander = p["temp_ramp_K_per_s"], p["temp_wander_K"]
        self.temp_w = 2.0 * math.pi / p["temp_wander_period_s"]
        self.offset_wander = p["offset_wander_v"]
        self.offset_w = 2.0 * math.pi / p["offset_wander_period_s"]
        self.drifts = self.temp_ramp != 0 or self.temp_wander != 0
        # Temperature start value itself does not matter: only dT enters.

        self.kick_sites = KickSites(stream(self.seed, STREAM_KICKS), p["kicks_per_kstep"],
                                    p["kick_slip_steps"], p["travel_min_steps"], p["travel_max_steps"])
        self.adc = Adc(p["adc_bits"], p["adc_full_scale_v"])
        self.settle_s = self.sweep.get("settle_s", 0.0)
        dt = max(self.settle_s, p["read_time_s"])
        if self.sweep.get("mode") == "scan" and self.sweep.get("speed_steps_per_s"):
            dt = max(p["read_time_s"], self.sweep["step"] / self.sweep["speed_steps_per_s"])
        self.dt_read_s = dt
        # The detector is a camera only in camera scenarios; any rig can render frames.
        self.camera = self.make_camera() if p["detector"] == "camera" else None

    def make_camera(self) -> CameraModel:
        p = self.params
        return CameraModel(p["camera_width_px"], p["camera_height_px"], p["spot_radius_px"],
                           p["spot_counts_per_v"], p["camera_background_counts"],
                           p["camera_noise_counts"], p["spot_shift_px_per_deg"],
                           self.angle_deg(self.sweep_centre_steps()))

    # -- geometry -----------------------------------------------------------------
    def sweep_centre_steps(self) -> float:
        return 0.5 * (self.sweep["start"] + self.sweep["stop"])

    def angle_deg(self, x, xp=math):
        return self.lever.angle_deg(x, xp)

    def wavelength_nm(self, x, xp=math):
        """Littrow feedback wavelength at mount position x (steps)."""
        return self.two_d_over_m * xp.sin(self.lever.angle_deg(x, xp) * (math.pi / 180.0))

    def tuning_nm_per_step(self, x: float) -> float:
        h = 0.5
        return (self.wavelength_nm(x + h) - self.wavelength_nm(x - h)) / (2 * h)

    # -- chip ---------------------------------------------------------------------
    def phase_index(self, lam_nm, xp=math):
        return self.dispersion.index(lam_nm, xp)

    def group_index(self, lam_nm, xp=math):
        return self.dispersion.group_index(lam_nm, xp)

    def mode_number(self, lam_nm, dT=0.0, xp=math):
        lam2 = lam_nm * lam_nm * 1e-6
        n = xp.sqrt(1.0 + self.osc_b * lam2 / (lam2 - self.osc_c_um2))
        return 2.0 * self.length_nm * n * (1.0 + self.alpha_per_K * dT) / lam_nm

    def mode_spacing_nm(self, lam_nm: float) -> float:
        return optics.mode_spacing_nm(lam_nm, self.group_index(lam_nm), self.length_nm * 1e-3)

    # -- time ---------------------------------------------------------------------
    def temp_offset_K(self, t_s, xp=math):
        if not self.drifts:
            return 0.0 * t_s
        return self.temp_ramp * t_s + self.temp_wander * xp.sin(self.temp_w * t_s + self.temp_phase)

    def offset_v(self, t_s, xp=math):
        if self.offset_wander == 0:
            return 0.0 * t_s
        return self.offset_wander * xp.sin(self.offset_w * t_s + self.offset_phase)

    # -- optics -------------------------------------------------------------------
    def gain_shapes(self, lam_nm, dT=0.0, xp=math):
        """(gain envelope g, lasing envelope h), both 0..1."""
        centre = self.gain_centre + self.gain_shift * dT
        u = (lam_nm - centre) * self.inv_fwhm
        g = xp.exp(-FOUR_LN2 * u * u)
        lo = xp.tanh((lam_nm - (centre - self.half_range)) * self.inv_2edge)
        hi = xp.tanh(((centre + self.half_range) - lam_nm) * self.inv_2edge)
        return g, g * 0.25 * (1.0 + lo) * (1.0 + hi)

    def power_v(self, lam_nm, dT=0.0, xp=math):
        """Noise-free optical output at the detector, volts."""
        g, h = self.gain_shapes(lam_nm, dT, xp)
        r = self.r_sub + self.r_gain * h
        coef = 4.0 * r / ((1.0 - r) * (1.0 - r))
        s = xp.sin(math.pi * self.mode_number(lam_nm, dT, xp))
        blip = 1.0 / (1.0 + coef * s * s)
        if self.ext_c > 0:
            se = xp.sin(math.pi * self.two_lext_nm / lam_nm)
            blip = blip * (1.0 - self.ext_c + self.ext_c / (1.0 + self.ext_coef * se * se))
        amp = (1.0 - self.power_drop * dT) * (self.a_las * h + self.a_sub * g)
        return self.dark + self.spont * (0.85 + 0.15 * g) + amp * blip

    def lasing_finesse(self, lam_nm: float) -> float:
        _, h = self.gain_shapes(lam_nm)
        return optics.finesse(self.r_sub + self.r_gain * h)


def _first(*values):
    for v in values:
        if v is not None:
            return v
    return None

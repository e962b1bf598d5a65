"""The simulated rig's ``[sim]`` keys, the built-in scenarios, and their checks.

A scenario is a named set of physics parameters. Every parameter key of
``[sim]`` defaults to None, meaning "the scenario's value"; a value given in
the rig file (or with ``--set sim.KEY=VALUE``) overrides the scenario. The
numbers describe our demo bench (an invented 940 nm InGaAs/GaAs chip, about
800 um long, uncoated facets); values marked "from memory" are typical of the
trade, not measured.
"""
from __future__ import annotations

from typing import Any

# Every physics parameter with its value when no scenario changes it.
BASE_PARAMS: dict[str, Any] = {
    # Chip: true length and an effective-index dispersion model fixed by the
    # phase and group index at index_ref_nm (sims.dispersion.single_oscillator).
    "chip_length_um": 797.02,     # the default sweep then ends ~17 steps from a mode on both sides
    "phase_index": 3.41,          # effective index of a GaAs-based waveguide (from memory)
    "group_index": 3.64,
    "index_ref_nm": 936.0,
    # Blip shape: Airy in the chip round-trip phase. Below threshold the
    # effective reflectance is the bare facet's; in the lasing range the
    # single-pass gain raises sqrt(R1 R2) G towards 1, sharpening the blip.
    "facet_reflectance": 0.32,    # uncoated facet, Fresnel ((n-1)/(n+1))^2 ~ 0.3
    "lasing_reflectance": 0.62,
    # Gain envelope (Gaussian) and the lasing range within it.
    "gain_centre_nm": 936.5,
    "gain_fwhm_nm": 30.0,
    "lasing_halfwidth_nm": 14.0,
    "lasing_edge_nm": 0.05,      # threshold is sharp: about one mode from off to lasing
    # Detector-side amplitudes, volts at the meter.
    "blip_height_v": 1.5,
    "subthreshold_height_v": 0.004,
    "spont_level_v": 0.30,
    "dark_offset_v": 0.010,
    # External cavity (back facet to grating), index ~1: structure inside a blip.
    "ext_cavity_mm": 25.0,
    "ext_reflectance": 0.35,
    "ext_contrast": 0.0,
    # Mechanics: true calibration (None = the rig's [stage]/[grating] values),
    # lever geometry, backlash, stick-slip kicks, hard end stops.
    "true_deg_per_step": None,
    "true_angle_at_zero_deg": None,
    "true_lines_per_mm": None,
    "lever_arm": "linear",
    "lever_perpendicular_steps": 0,
    "backlash_steps": 0.0,
    "kicks_per_kstep": 0.0,
    "kick_slip_steps": 18.0,
    "kick_recover_steps": 30.0,
    "travel_min_steps": -5000,
    "travel_max_steps": 40000,
    # Signal chain: source 1/f noise, meter white noise and spikes, ADC.
    "white_noise_v": 0.002,
    "pink_noise_v": 0.001,
    "spike_prob": 0.0,
    "spike_height_v": 1.0,
    "adc_bits": 12,
    "adc_full_scale_v": 5.0,
    "read_time_s": 0.0005,
    # Temperature drift: gain and modes move at different rates.
    "temp_ramp_K_per_s": 0.0,
    "temp_wander_K": 0.0,
    "temp_wander_period_s": 600.0,
    "gain_shift_nm_per_K": 0.28,  # band-gap shift of GaAs-based gain (from memory, ~0.3 nm/K)
    "mode_shift_nm_per_K": 0.07,  # chip-mode shift via dn/dT (from memory, ~0.06-0.1 nm/K)
    "power_drop_per_K": 0.01,
    "offset_wander_v": 0.0,
    "offset_wander_period_s": 300.0,
    # Truth: a mode is detectable when its blip height >= detect_k * noise sigma.
    "detect_k": 5.0,
    # Detector: "meter" (photodiode + ADC) or "camera" (beam spot, ROI sum).
    "detector": "meter",
    "camera_width_px": 128,
    "camera_height_px": 96,
    "spot_radius_px": 6.0,
    "spot_counts_per_v": 110.0,
    "camera_background_counts": 12.0,
    "camera_noise_counts": 2.0,
    "spot_shift_px_per_deg": 6.0,
}

# The [sim] schema for daq.rig: scenario and seed, then every parameter as
# (type, None) = "use the scenario's value".
SIM_SETTINGS: dict[str, Any] = {"scenario": "clean", "seed": 0}
for _key, _value in BASE_PARAMS.items():
    _kind = float if isinstance(_value, float) or _value is None else type(_value)
    SIM_SETTINGS[_key] = (_kind, None)
del _key, _value, _kind

SCENARIOS: dict[str, dict[str, Any]] = {
    "clean": {
        "description": "quiet meter, tight mount, lasing over the whole sweep",
        "countable": True,
        "params": {},
    },
    "noisy": {
        "description": "white and 1/f noise about 1/20 of a blip, plus single-sample spikes",
        "countable": True,
        "params": {"white_noise_v": 0.06, "pink_noise_v": 0.03, "spike_prob": 0.002,
                   "spike_height_v": 1.2},
    },
    "backlash": {
        "description": "heavy backlash: a 35-step dead band after each reversal",
        "countable": True,
        "params": {"backlash_steps": 35.0, "white_noise_v": 0.01},
    },
    "kicks": {
        "description": "stick-slip: the mount slips back 10-25 steps now and then, some blips seen twice",
        "countable": True,
        "params": {"kicks_per_kstep": 3.0, "kick_slip_steps": 18.0, "kick_recover_steps": 30.0,
                   "backlash_steps": 6.0, "white_noise_v": 0.01},
    },
    "split": {
        "description": "external-cavity structure splits each blip into two or three peaks",
        "countable": True,
        "params": {"ext_contrast": 0.6, "ext_cavity_mm": 30.0, "lasing_reflectance": 0.5,
                   "white_noise_v": 0.01},
    },
    "drift": {
        "description": "temperature ramp and wander (gain and modes shift), power and baseline drift",
        "countable": True,
        "params": {"temp_ramp_K_per_s": 0.01, "temp_wander_K": 0.15, "temp_wander_period_s": 9.0,
                   "power_drop_per_K": 0.05, "offset_wander_v": 0.25, "offset_wander_period_s": 7.0,
                   "white_noise_v": 0.01, "pink_noise_v": 0.01},
    },
    "clipped": {
        "description": "meter range too small: blip tops clip at a 1 V full scale, 10-bit ADC",
        "countable": True,
        "params": {"adc_full_scale_v": 1.0, "adc_bits": 10, "white_noise_v": 0.004},
    },
    "narrowgain": {
        "description": "lasing range narrower than the sweep: blips fade out at both ends",
        "countable": True,
        "params": {"lasing_halfwidth_nm": 4.5, "gain_fwhm_nm": 18.0, "white_noise_v": 0.01},
    },
    "lever": {
        "description": "sine-bar lever: angle not linear in steps, tuning rate ~1 % above the rig's calibration",
        "countable": True,
        "params": {"lever_arm": "sine", "lever_perpendicular_steps": -40000},
    },
    "camera": {
        "description": "camera instead of a meter: beam spot on a background, ROI sum, saturating pixels",
        "countable": True,
        "params": {"detector": "camera", "pink_noise_v": 0.004, "spot_counts_per_v": 150.0},
    },
    "rough": {
        "description": "a bad night: noise, spikes, backlash, kicks, split blips and drift together",
        "countable": False,
        "params": {"white_noise_v": 0.05, "pink_noise_v": 0.03, "spike_prob": 0.002,
                   "backlash_steps": 30.0, "kicks_per_kstep": 1.5, "ext_contrast": 0.5,
                   "ext_cavity_mm": 30.0, "lasing_reflectance": 0.5, "temp_ramp_K_per_s": 0.01,
                   "offset_wander_v": 0.2, "offset_wander_period_s": 7.0},
    },
}

LEVER_ARMS = ("linear", "sine", "tangent")
DETECTORS = ("meter", "camera")


def resolve_params(settings: dict[str, Any]) -> dict[str, Any]:
    """Base values, then the scenario's, then every non-None key of [sim]."""
    name = settings.get("scenario", SIM_SETTINGS["scenario"])
    if name not in SCENARIOS:
        raise ValueError(f"unknown scenario {name!r} (known: {', '.join(SCENARIOS)})")
    params = dict(BASE_PARAMS)
    params.update(SCENARIOS[name]["params"])
    params.update({k: v for k, v in settings.items() if k in BASE_PARAMS and v is not None})
    params["scenario"] = name
    params["seed"] = int(settings.get("seed", SIM_SETTINGS["seed"]))
    return params


def check_params(p: dict[str, Any]) -> list[tuple[str, str]]:
    """(key, message) for each impossible value of a resolved parameter set."""
    errors: list[tuple[str, str]] = []

    def need(ok: bool, key: str, message: str) -> None:
        if not ok:
            errors.append((key, f"{message}, got {p[key]!r}"))

    for key in ("chip_length_um", "index_ref_nm", "gain_centre_nm", "gain_fwhm_nm",
                "lasing_halfwidth_nm", "lasing_edge_nm", "ext_cavity_mm", "kick_recover_steps",
                "temp_wander_period_s", "offset_wander_period_s", "adc_full_scale_v",
                "read_time_s", "spot_radius_px", "detect_k", "spot_counts_per_v"):
        need(p[key] > 0, key, "must be positive")
    for key in ("blip_height_v", "subthreshold_height_v", "spont_level_v", "backlash_steps",
                "kicks_per_kstep", "kick_slip_steps", "white_noise_v", "pink_noise_v",
                "spike_height_v", "temp_wander_K", "offset_wander_v", "camera_noise_counts",
                "camera_background_counts"):
        need(p[key] >= 0, key, "must not be negative")
    for key in ("facet_reflectance", "lasing_reflectance", "ext_reflectance"):
        need(0 < p[key] < 1, key, "a reflectance must lie strictly between 0 and 1")
    for key in ("ext_contrast", "spike_prob", "power_drop_per_K"):
        need(0 <= p[key] <= 1, key, "must lie between 0 and 1")
    need(p["phase_index"] > 1, "phase_index", "must be above 1")
    if p["phase_index"] > 1:
        need(p["group_index"] > p["phase_index"], "group_index",
             f"must exceed phase_index ({p['phase_index']}) for normal dispersion")
    need(1 <= p["adc_bits"] <= 24, "adc_bits", "must be 1..24")
    need(p["lever_arm"] in LEVER_ARMS, "lever_arm", f"must be one of {', '.join(LEVER_ARMS)}")
    need(p["detector"] in DETECTORS, "detector", f"must be one of {', '.join(DETECTORS)}")
    need(p["travel_min_steps"] < p["travel_max_steps"], "travel_min_steps",
         f"must be below travel_max_steps ({p['travel_max_steps']})")
    for key in ("camera_width_px", "camera_height_px"):
        need(16 <= p[key] <= 4096, key, "must be 16..4096 pixels")
    if 16 <= p["camera_width_px"] and 16 <= p["camera_height_px"]:
        need(p["spot_radius_px"] * 8 <= min(p["camera_width_px"], p["camera_height_px"]),
             "spot_radius_px", "spot too big for the frame (needs 8 radii across its short side)")
    if p["true_lines_per_mm"] is not None:
        need(p["true_lines_per_mm"] > 0, "true_lines_per_mm", "must be positive")
    if p["true_deg_per_step"] is not None:
        need(p["true_deg_per_step"] != 0, "true_deg_per_step", "must not be 0")
    return errors


def validate_sim_settings(settings: dict[str, Any]) -> list[tuple[str, str]]:
    """(key, one-line message) for each impossible [sim] value; [] when all is well."""
    name = settings.get("scenario", SIM_SETTINGS["scenario"])
    if name not in SCENARIOS:
        return [("scenario", f"unknown scenario {name!r} (known: {', '.join(SCENARIOS)})")]
    return check_params(resolve_params(settings))

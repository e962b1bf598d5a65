"""analyze_trace: the mode map, the spectral cross-check, gaps, passes, calibrated and not."""
from __future__ import annotations

import json
from dataclasses import replace

import numpy as np
import pytest
from scipy.signal import periodogram

from analysis.modefit import fit_spacing
from analysis.pipeline import analyze_trace, directions_from_positions
from tests.tracegen import Spec, make_trace


def test_directions_and_passes_from_positions():
    pos = np.array([5, 5, 6, 7, 7, 8, 7, 6, 6, 5, 6, 7], float)
    d, p = directions_from_positions(pos)
    assert d.tolist() == [1, 1, 1, 1, 1, 1, -1, -1, -1, -1, 1, 1]
    assert p.tolist() == [0, 0, 0, 0, 0, 0, 1, 1, 1, 1, 2, 2]


def test_period_agrees_with_an_fft_periodogram_of_the_same_pass():
    # Independent check of the spectral period: scipy.signal.periodogram (FFT) of the
    # middle half of the pass, sampled once per step, against the Lomb-Scargle result
    # and against the spacing fitted from the counted modes.
    tr = make_trace(Spec(seed=31, n_modes=100, spacing_steps=40, snr=30, width_frac=0.3,
                         shape="gauss"))
    r = analyze_trace(tr.position, tr.value, sections=tr.sections)
    n = tr.value.size
    y = tr.value[n // 4: 3 * n // 4]
    f, pxx = periodogram(y - y.mean(), nfft=1 << 18)
    sel = (f > 1 / 80) & (f < 1 / 20)
    fft_period = 1 / f[sel][np.argmax(pxx[sel])]
    assert r["spectral_period_steps"] == pytest.approx(fft_period, rel=0.005)
    assert r["spectral_period_steps"] == pytest.approx(r["spacing_steps"], rel=0.01)


def test_mode_map_fit_and_missing_mode():
    # mode 30 of the sweep gets no blip at all: a gap, and the fit does not care
    tr = make_trace(Spec(seed=32, n_modes=60, spacing_steps=50, snr=40, drop_modes=(30,)))
    r = analyze_trace(tr.position, tr.value, sections=tr.sections)
    assert len(r["gaps"]) == 1 and r["gaps"][0]["missing"] == 1
    assert r["modes"] == tr.truth["modes_strong"] == len(r["mode_map"])   # dropped one not counted
    assert r["spacing_steps"] == pytest.approx(tr.truth["spacing_steps"], rel=0.005)
    # the map's centres are the true mode positions to a fraction of a step
    centres = np.array([m["centre_steps"] for m in r["mode_map"]])
    true = np.sort(np.setdiff1d(tr.truth["mode_positions"], tr.truth["dropped_positions"]))
    assert np.max(np.abs(np.sort(centres) - true[:centres.size])) < 0.5
    # the fit's standard error is the least-squares one (numpy's covariance, same model)
    k = np.array([m["mode"] for m in r["mode_map"]], float)
    kc = 0.5 * (k.min() + k.max())
    deg = 3 if k.size >= 20 else 2                   # the model fit_spacing states
    coef, cov = np.polyfit(k - kc, centres, deg, cov="unscaled")
    resid = centres - np.polyval(coef, k - kc)
    s2 = resid @ resid / (k.size - deg - 1)
    assert r["fit"]["se_least_squares"] == pytest.approx(np.sqrt(cov[-2, -2] * s2), rel=1e-6)
    # (the autocorrelation factor on top of it is checked by Monte Carlo in test_modefit.py)
    assert fit_spacing(k, centres)[0] == pytest.approx(abs(coef[-2]))
    assert all("wavelength_nm" in m for m in r["mode_map"])


def test_passes_agree_and_the_backlash_is_found():
    tr = make_trace(Spec(seed=33, n_modes=50, spacing_steps=40, passes=4, backlash_steps=28, snr=25))
    r = analyze_trace(tr.position, tr.value, sections=tr.sections)
    assert [p["direction"] for p in r["per_pass"]] == [1, -1, 1, -1]
    assert all(p["consistent"] for p in r["per_pass"])
    assert r["backlash_steps"] == pytest.approx(28.0, abs=1.0)
    assert all(m["centre_up_steps"] - m["centre_down_steps"] == pytest.approx(28.0, abs=2.0)
               for m in r["mode_map"] if m["centre_down_steps"] is not None and m["centre_up_steps"])


def test_uncalibrated_trace_has_counts_and_steps_but_no_nm():
    tr = make_trace(Spec(seed=34, n_modes=30, spacing_steps=40, snr=30))
    r = analyze_trace(tr.position, tr.value)           # no rig: uncalibrated
    assert r["modes"] >= 29 and r["spacing_steps"] is not None
    assert r["spacing_nm"] is None and r["length_um"] is None and r["budget"] is None
    assert r["by_count"]["spacing_steps"] == pytest.approx(r["spacing_steps"], rel=0.01)
    json.dumps(r)


def test_calibrated_result_is_json_with_budget_and_monte_carlo():
    tr = make_trace(replace(Spec(seed=35, n_modes=40, spacing_steps=60, snr=30)))
    r = analyze_trace(tr.position, tr.value, sections=tr.sections)
    out = json.loads(json.dumps(r))
    for key in ("modes", "crossings", "spacing_steps", "spacing_steps_u", "spacing_nm", "spacing_nm_u",
                "wavelength_nm", "length_um", "length_um_u", "backlash_steps", "budget", "mode_map",
                "gaps", "per_pass", "spectral_period_steps"):
        assert key in out
    assert out["length_um"] == pytest.approx(tr.truth["length_um"], rel=0.03)
    assert out["by_count"]["length_um"] == pytest.approx(tr.truth["length_um"], rel=0.03)
    assert {b["input"] for b in out["budget"]} >= {"[chip] group_index", "[stage] deg_per_step"}
    assert out["length_um_monte_carlo"]["u"] == pytest.approx(out["length_um_u"], rel=0.05)

"""The mode map's geometry: spacing from blip centres, and one centre per mode from both directions.

Used by the streaming counter (its live estimate) and by the offline pipeline.
"""
from __future__ import annotations

import math

import numpy as np


def fit_spacing(k: np.ndarray, centre: np.ndarray, weight: np.ndarray | None = None
                ) -> tuple[float | None, float | None, dict]:
    """Spacing = slope of blip centre against mode number at the middle of the range.

    A cubic is fitted from 20 modes on, a quadratic from 6 (the spacing in steps
    changes across a wide sweep: Littrow tuning is not linear in angle, and the
    group index varies), centred on the middle mode so the linear coefficient
    is the spacing there; its standard error comes from the residual scatter.
    Fewer than 6 modes: a straight line; fewer than 3: None.

    Gross outliers (a centre pulled by a kick) are dropped from REJECT_MIN_MODES
    modes on; with fewer, a 5-MAD cut drops good centres too often and the fit
    then claims a precision it does not have. Residuals that follow each other
    (a drift or a slow wobble the polynomial does not take up) carry less
    information than as many independent ones: with r1 their lag-1
    autocorrelation (in mode order) and n_eff = n (1 - r1) / (1 + r1), the
    standard error is multiplied by sqrt((n - p) / (n_eff - p)) for p fitted
    coefficients, the effective-sample-size correction for a trend under AR(1)
    errors (Santer et al., J. Geophys. Res. 105 (2000) 7337, from memory; for
    large n it is sqrt((1 + r1) / (1 - r1))); details hold both standard errors
    and the effective degrees of freedom n_eff - p. (r1 of fit residuals is
    biased low with few modes, so the correction falls somewhat short there.)
    Returns (spacing, standard error, details).
    """
    k = np.asarray(k, float)
    c = np.asarray(centre, float)
    w = np.ones_like(k) if weight is None else np.asarray(weight, float)
    ok = np.isfinite(c) & np.isfinite(k) & (w > 0)
    k, c, w = k[ok], c[ok], w[ok]
    if k.size < 3:
        return None, None, {}
    kc = 0.5 * (k.min() + k.max())
    x = k - kc
    # Littrow tuning (a sine) and the chip's dispersion bend the centres smoothly: a cubic
    # takes that up when there are modes enough, so the residuals are scatter, not model.
    deg = 3 if k.size >= 20 else (2 if k.size >= 6 else 1)
    keep = np.ones(k.size, bool)
    for _ in range(3 if k.size >= REJECT_MIN_MODES else 0):   # drop gross outliers (a kick, a glitch)
        coef, cov, resid = _wls(x[keep], c[keep], w[keep], deg)
        r_all = c - np.polyval(coef, x)
        mad = 1.4826 * np.median(np.abs(r_all[keep] - np.median(r_all[keep])))
        limit = max(5.0 * mad, 1e-9)
        new = np.abs(r_all) <= limit
        if new.sum() < deg + 2 or np.array_equal(new, keep):
            break
        keep = new
    coef, cov, resid = _wls(x[keep], c[keep], w[keep], deg)
    slope = coef[-2]
    se_ls = math.sqrt(max(cov[-2, -2], 0.0))
    n, p = int(keep.sum()), deg + 1
    order = np.argsort(x[keep], kind="stable")
    scale = float(np.ptp(c[keep])) or 1.0
    r1 = 0.0 if np.sqrt(np.mean(resid ** 2)) < 1e-9 * scale else \
        lag1_autocorrelation((resid * np.sqrt(w[keep]))[order])   # an exact curve: rounding, not scatter
    n_eff = n * (1.0 - r1) / (1.0 + r1)
    factor = math.sqrt((n - p) / max(n_eff - p, 1.0)) if r1 > 0 else 1.0
    details = {"k_centre": kc, "degree": deg, "coef": coef.tolist(),
               "n_modes": n, "outliers": int((~keep).sum()),
               "residual_rms_steps": float(np.sqrt(np.mean(resid ** 2))) if resid.size else 0.0,
               "centre_steps": float(np.polyval(coef, 0.0)),
               "se_least_squares": se_ls, "residual_lag1": r1, "se_factor": factor,
               "dof": max(n_eff - p, 1.0)}
    return abs(float(slope)), se_ls * factor, details


REJECT_MIN_MODES = 15   # modes from which gross outliers are dropped
R1_MAX = 0.9            # the most autocorrelation credited (factor 4.4): beyond, the model is wrong


def lag1_autocorrelation(r: np.ndarray) -> float:
    """Lag-1 autocorrelation of residuals in order, clipped to [0, R1_MAX]; 0 below 10 of
    them (too few to tell). Negative values are not credited: they would shrink the error."""
    r = np.asarray(r, float)
    if r.size < 10:
        return 0.0
    r = r - r.mean()
    den = float(r @ r)
    if den <= 0:
        return 0.0
    return float(min(max(float(r[:-1] @ r[1:]) / den, 0.0), R1_MAX))


def _wls(x, y, w, deg):
    """Weighted least squares polynomial (highest power first), covariance from residuals."""
    A = np.vander(x, deg + 1)
    sw = np.sqrt(w)
    Aw, yw = A * sw[:, None], y * sw
    coef, *_ = np.linalg.lstsq(Aw, yw, rcond=None)
    resid = y - A @ coef
    dof = max(x.size - (deg + 1), 1)
    s2 = float(np.sum(w * resid ** 2) / dof)
    try:
        cov = np.linalg.inv(Aw.T @ Aw) * s2
    except np.linalg.LinAlgError:
        cov = np.full((deg + 1, deg + 1), np.inf)
    return coef, cov, resid


def mechanical_centres(mc: dict) -> tuple[float | None, np.ndarray]:
    """Backlash (median up-minus-down centre offset) and one centre per mode.

    The mechanical centre is the mean of the up and down centres (or one of
    them moved by half the backlash), i.e. the position the mode would have
    with the play of the mount split evenly between the directions.
    """
    up, dn = mc["centre_up"], mc["centre_down"]
    both = np.isfinite(up) & np.isfinite(dn)
    backlash = float(np.median(up[both] - dn[both])) if both.any() else None
    b2 = 0.0 if backlash is None else backlash / 2
    nu, nd = mc["n_up"], mc["n_down"]
    with np.errstate(invalid="ignore", divide="ignore"):
        mech = np.where(both, ((up - b2) * nu + (dn + b2) * nd) / (nu + nd),
                        np.where(np.isfinite(up), up - b2, dn + b2))
    if backlash is None and np.isfinite(up).any() and np.isfinite(dn).any():
        # both directions seen but never the same mode: keep the larger set only
        keep_up = np.isfinite(up).sum() >= np.isfinite(dn).sum()
        mech = np.where(np.isfinite(up) if keep_up else np.isfinite(dn), mech, np.nan)
    return backlash, mech

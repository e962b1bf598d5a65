"""Uncertainty of a measurement model y = f(x1..xN) with uncorrelated inputs.

* Law of propagation of uncertainty (JCGM 100:2008, the GUM, eq. 10):
  u_c(y)^2 = sum_i (c_i u(x_i))^2 with sensitivity coefficients
  c_i = df/dx_i, here from central differences.
* Monte Carlo propagation of distributions (JCGM 101:2008): draw every input
  from its (Gaussian) distribution, evaluate f, report the standard deviation
  and the 95 % coverage interval of the results.
The budget lists every input's contribution |c_i| u(x_i) and its share of
u_c^2, largest first, so a report can say which inputs dominate.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Callable

import numpy as np


@dataclass(frozen=True)
class Input:
    name: str          # e.g. "[chip] group_index"
    value: float
    u: float           # standard uncertainty (k = 1)
    source: str = ""   # where the value and u came from


def gum(f: Callable[..., float], inputs: list[Input]) -> tuple[float, float, list[dict]]:
    """(y, u_c(y), budget) by the GUM law of propagation (first order)."""
    x = [i.value for i in inputs]
    y = f(*x)
    rows = []
    total = 0.0
    for k, inp in enumerate(inputs):
        if inp.u <= 0:
            c = 0.0
        else:
            h = inp.u * 1e-3 if inp.u else abs(inp.value) * 1e-6
            xp, xm = list(x), list(x)
            xp[k] += h
            xm[k] -= h
            c = (f(*xp) - f(*xm)) / (2 * h)
        contrib = abs(c) * inp.u
        total += contrib ** 2
        rows.append({"input": inp.name, "value": inp.value, "u": inp.u, "sensitivity": c,
                     "contribution": contrib, "source": inp.source})
    u = math.sqrt(total)
    for r in rows:
        r["share"] = (r["contribution"] ** 2 / total) if total > 0 else 0.0
    rows.sort(key=lambda r: -r["contribution"])
    return y, u, rows


def monte_carlo(f: Callable[..., np.ndarray], inputs: list[Input], draws: int = 200_000,
                seed: int = 20081) -> dict:
    """JCGM 101 propagation with Gaussian inputs; f must accept numpy arrays."""
    rng = np.random.default_rng(seed)
    samples = [inp.value + inp.u * rng.standard_normal(draws) if inp.u > 0
               else np.full(draws, inp.value) for inp in inputs]
    y = np.asarray(f(*samples), dtype=float)
    y = y[np.isfinite(y)]
    lo, hi = np.percentile(y, [2.5, 97.5])
    return {"mean": float(y.mean()), "u": float(y.std(ddof=1)), "interval95": [float(lo), float(hi)],
            "draws": int(y.size)}

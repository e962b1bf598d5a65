"""Reading a trace from CSV: a header naming at least ``position`` and ``intensity``."""
from __future__ import annotations

import csv
from pathlib import Path

import numpy as np

REQUIRED = ("position", "intensity")


def read_trace_csv(path: str | Path) -> dict[str, np.ndarray]:
    """Columns of a CSV trace as float arrays; ValueError (one line) when unusable.

    ``position`` is the commanded actuator position in steps, in time order;
    other numeric columns (``time_s``, ``direction``, ``pass``...) come along.
    """
    p = Path(path)
    try:
        fh = open(p, newline="", encoding="utf-8")
    except OSError as exc:
        raise ValueError(f"{p}: cannot read it ({exc.strerror})") from None
    with fh:
        try:
            reader = csv.reader(fh)
            header = next(reader, None)
            if not header:
                raise ValueError(f"{p}: empty file, expected a header with {', '.join(REQUIRED)}")
            names = [h.strip().lower() for h in header]
            missing = [r for r in REQUIRED if r not in names]
            if missing:
                raise ValueError(f"{p}: header {header} has no column {', '.join(missing)} "
                                 f"(need {', '.join(REQUIRED)})")
            cols: list[list[float]] = [[] for _ in names]
            for line_no, row in enumerate(reader, start=2):
                if not row or all(not c.strip() for c in row):
                    continue
                if len(row) != len(names):
                    raise ValueError(f"{p}: line {line_no} has {len(row)} fields, the header has {len(names)}")
                for j, cell in enumerate(row):
                    try:
                        cols[j].append(float(cell))
                    except ValueError:
                        if names[j] in REQUIRED:
                            raise ValueError(f"{p}: line {line_no}: {names[j]} = {cell!r} is not a number") from None
                        cols[j].append(float("nan"))
        except UnicodeDecodeError:
            raise ValueError(f"{p}: not a text CSV file") from None
        except csv.Error as exc:
            raise ValueError(f"{p}: not a readable CSV ({exc})") from None
    out = {n: np.asarray(c, dtype=np.float64) for n, c in zip(names, cols)}
    if out["position"].size == 0:
        raise ValueError(f"{p}: no data rows")
    if not (np.isfinite(out["position"]).all() and np.isfinite(out["intensity"]).all()):
        raise ValueError(f"{p}: position and intensity must be finite numbers")
    return out

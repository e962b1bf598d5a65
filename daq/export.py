"""Export a run log to plain files other tools read: samples, events and the mode map as CSV.

``samples.csv`` is written block by block from the log, so a night's tens of
millions of samples never sit in memory at once. Its header uses the names
``analysis.trace_io`` looks for (``position``, ``intensity``), so
``modetick analyze samples.csv`` reads an export back. Floats are written with
Python's shortest round-trip repr: reading the file back gives the logged
numbers bit for bit.
"""
from __future__ import annotations

import csv
import math
import re
from pathlib import Path
from typing import Any, Iterable

import numpy as np

from daq.cmd_modes import COLUMNS as MODE_COLUMNS
from daq.runlog import RunLog

SAMPLE_COLUMNS = ("time_s", "position", "direction", "pass", "intensity", "spread")
EVENT_COLUMNS = ("sample_index", "time_s", "kind", "position", "direction", "mode", "height",
                 "width", "detail")


def _aux_names(log: RunLog) -> list[str]:
    """Every auxiliary channel name in the log (a channel may start mid-run)."""
    names: set[str] = set()
    for block in log.iter_blocks():
        names.update(block.aux)
    return sorted(names)


def aux_header(names: Iterable[str]) -> list[str]:
    """CSV-safe column names for aux channels, prefixed ``aux_`` only on a clash."""
    out = []
    for name in names:
        col = re.sub(r"[^A-Za-z0-9_]+", "_", name).strip("_") or "aux"
        if col in SAMPLE_COLUMNS or col in out:
            col = f"aux_{col}"
        out.append(col)
    return out


def _num(x: float) -> str:
    """Shortest exact text for a float; a missing value (NaN) is an empty field."""
    return "" if math.isnan(x) else repr(float(x))


def write_samples_csv(log: RunLog, path: Path) -> int:
    """samples.csv; returns the number of rows written."""
    names = _aux_names(log)
    rows = 0
    with open(path, "w", encoding="utf-8", newline="") as fh:
        fh.write(",".join(list(SAMPLE_COLUMNS) + aux_header(names)) + "\n")
        for b in log.iter_blocks():
            n = len(b)
            # Times are stored in whole microseconds: six decimals are exact.
            cols = [[f"{t:.6f}" for t in b.t_s.tolist()],
                    [str(p) for p in b.position_steps.tolist()],
                    [str(d) for d in b.direction.tolist()],
                    [str(p) for p in b.pass_index.tolist()],
                    [repr(v) for v in b.value.tolist()],
                    [repr(v) for v in b.spread.tolist()]]
            for name in names:
                a = b.aux.get(name)
                cols.append([""] * n if a is None else [_num(v) for v in a.tolist()])
            fh.writelines(",".join(r) + "\n" for r in zip(*cols))
            rows += n
    return rows


def write_events_csv(log: RunLog, path: Path) -> int:
    events = log.events()
    with open(path, "w", encoding="utf-8", newline="") as fh:
        w = csv.writer(fh, lineterminator="\n")
        w.writerow(EVENT_COLUMNS)
        for e in events:
            w.writerow(["" if e[k] is None else e[k]
                        for k in ("i", "t_s", "kind", "pos", "dir", "mode", "height", "width", "detail")])
    return len(events)


def _table_rows(table: list[dict], first: tuple[str, ...] = ()) -> tuple[list[str], list[list[Any]]]:
    """(header, rows) from a list of flat dicts: the ``first`` columns, then any others."""
    header = list(first)
    for row in table or []:
        header.extend(k for k in row if k not in header)
    return header, [[row.get(k) for k in header] for row in table or []]


def _cell(v: Any) -> Any:
    if v is None or (isinstance(v, float) and math.isnan(v)):
        return ""
    if isinstance(v, (list, tuple, np.ndarray)):
        return " ".join(str(_cell(x)) for x in v)
    if isinstance(v, float):
        return repr(v)
    return v


def write_table_csv(table: list[dict], path: Path, first: tuple[str, ...] = ()) -> int:
    """An analysis table (the mode map) as CSV; returns the number of rows."""
    header, rows = _table_rows(table, first)
    with open(path, "w", encoding="utf-8", newline="") as fh:
        w = csv.writer(fh, lineterminator="\n")
        w.writerow(header)
        w.writerows([_cell(v) for v in row] for row in rows)
    return len(rows)


def export_csv(log: RunLog, out_dir: Path, mode_map: Any) -> dict[str, tuple[Path, int]]:
    """Write samples.csv, events.csv and modes.csv into out_dir: {name: (path, rows)}."""
    out_dir.mkdir(parents=True, exist_ok=True)
    files = {"samples": out_dir / "samples.csv", "events": out_dir / "events.csv",
             "modes": out_dir / "modes.csv"}
    return {
        "samples": (files["samples"], write_samples_csv(log, files["samples"])),
        "events": (files["events"], write_events_csv(log, files["events"])),
        # The columns of `modetick modes --csv`, so one reader takes both files.
        "modes": (files["modes"], write_table_csv(mode_map, files["modes"], MODE_COLUMNS)),
    }

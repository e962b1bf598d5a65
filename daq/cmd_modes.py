"""``modetick modes``: the mode map of a run log, on screen, as JSON or as CSV."""
from __future__ import annotations

import csv
import json
import math
import sys
from dataclasses import dataclass, field
from pathlib import Path

from daq.errors import fail
from daq.numbers import no_negative_zero
from daq.rig import RigError
from daq.runlog import LogError, RunLog

HELP = "list every mode of a run log: centre in steps (up and down), height, width, wavelength; CSV export"

# CSV columns, in order; the names are the analysis's mode-map keys.
COLUMNS = ("mode", "centre_up_steps", "centre_down_steps", "centre_steps", "n_up", "n_down",
           "height", "width_steps", "wavelength_nm")


class MapError(ValueError):
    """A log without a usable mode map; str() is one line."""


@dataclass
class ModeRow:
    mode: int
    centre_up_steps: float | None
    centre_down_steps: float | None
    centre_steps: float | None = None     # mechanical centre (play split between the directions)
    n_up: int = 0
    n_down: int = 0
    height: float | None = None           # above the baseline, detector units
    width_steps: float | None = None      # FWHM
    wavelength_nm: float | None = None    # Littrow wavelength at centre_steps, when calibrated

    def centre(self, direction: int) -> float | None:
        return self.centre_up_steps if direction > 0 else self.centre_down_steps

    def as_dict(self) -> dict:
        return {k: getattr(self, k) for k in COLUMNS}


@dataclass
class ModeMap:
    rows: list[ModeRow]
    direction: int                         # +1 / -1: the first pass, the side the map was made from
    spacing_steps: float | None = None
    backlash_steps: float | None = None
    calibrated: bool = False
    source: str = ""
    by_mode: dict = field(default_factory=dict)

    def __post_init__(self):
        self.by_mode = {r.mode: r for r in self.rows}

    def row(self, mode: int) -> ModeRow | None:
        return self.by_mode.get(mode)

    def span(self) -> str:
        ks = sorted(self.by_mode)
        return f"{ks[0]}..{ks[-1]}" if ks else "none"


def _num(x):
    return None if x is None or (isinstance(x, float) and not math.isfinite(x)) else x


def _rows(table: list[dict]) -> list[ModeRow]:
    out = []
    for r in table:
        out.append(ModeRow(int(r["mode"]), _num(r.get("centre_up_steps")), _num(r.get("centre_down_steps")),
                           _num(r.get("centre_steps")), int(r.get("n_up") or 0), int(r.get("n_down") or 0),
                           _num(r.get("height")), _num(r.get("width_steps")), _num(r.get("wavelength_nm"))))
    return sorted(out, key=lambda row: row.mode)


def load_mode_map(log: RunLog) -> ModeMap:
    """The map the run's summary holds, or (a run killed before its summary) the offline analysis."""
    rig = log.rig()
    summary = log.summary()
    if summary and summary.get("mode_map") is not None:
        result, source = summary, "the run's summary"
    else:
        from daq.summary import analyze_log
        result, source = analyze_log(log, rig.sections), "analysed now"
    if not result or not result.get("mode_map"):
        raise MapError(f"log {log.path}: no modes counted, so no map")
    sw = rig["sweep"]
    return ModeMap(_rows(result["mode_map"]), 1 if sw["stop"] > sw["start"] else -1,
                   _num(result.get("spacing_steps")), _num(result.get("backlash_steps")),
                   rig.calibrated(), source)


def configure(p) -> None:
    p.add_argument("log_file", metavar="LOG", help="a modetick run log (.db)")
    p.add_argument("--csv", metavar="FILE", help="also write the map as CSV (one row a mode)")
    p.add_argument("--json", action="store_true", help="print the map as one JSON object")


def write_csv(mmap: ModeMap, path: Path) -> None:
    with open(path, "w", encoding="utf-8", newline="") as fh:
        w = csv.writer(fh, lineterminator="\n")
        w.writerow(COLUMNS)
        for r in mmap.rows:
            # repr: the shortest text that reads back as the same float
            w.writerow(["" if v is None else (repr(v) if isinstance(v, float) else v)
                        for v in (getattr(r, k) for k in COLUMNS)])


def read_csv(path: Path) -> list[dict]:
    """The rows of a CSV written by write_csv, typed back (empty cells are None)."""
    ints = {"mode", "n_up", "n_down"}
    with open(path, encoding="utf-8", newline="") as fh:
        return [{k: (None if v == "" else (int(v) if k in ints else float(v))) for k, v in row.items()}
                for row in csv.DictReader(fh)]


def run(args) -> int:
    try:
        log = RunLog.open(args.log_file)
        mmap = load_mode_map(log)
    except (LogError, RigError, MapError) as exc:
        return fail(exc, 2)
    log.close()
    if args.csv:
        try:
            write_csv(mmap, Path(args.csv))
        except OSError as exc:
            return fail(f"cannot write {args.csv}: {exc}", 2)
    if args.json:
        print(json.dumps({"log": str(log.path), "modes": len(mmap.rows), "spacing_steps": mmap.spacing_steps,
                          "backlash_steps": mmap.backlash_steps,
                          "direction": "up" if mmap.direction > 0 else "down", "calibrated": mmap.calibrated,
                          "source": mmap.source, "mode_map": [r.as_dict() for r in mmap.rows]}))
    else:
        _print_table(mmap, str(log.path))
    if args.csv:
        print(f"modetick: wrote {len(mmap.rows)} modes to {args.csv}", file=sys.stderr)
    return 0


def _print_table(mmap: ModeMap, path: str) -> None:
    from rich.console import Console
    from rich.table import Table
    f = lambda v, d=2: "" if v is None else f"{v:.{d}f}"  # noqa: E731
    t = Table(title=f"modes of {path}", caption=(
        f"{len(mmap.rows)} modes; map made moving {'up' if mmap.direction > 0 else 'down'}"
        + (f"; spacing {mmap.spacing_steps:.3f} steps" if mmap.spacing_steps else "")
        + (f"; backlash {no_negative_zero(mmap.backlash_steps):.1f} steps"
           if mmap.backlash_steps is not None else "")))
    for col in ("mode", "centre up (steps)", "centre down (steps)", "height", "width (steps)"):
        t.add_column(col, justify="right")
    if mmap.calibrated:
        t.add_column("wavelength (nm)", justify="right")
    for r in mmap.rows:
        cells = [str(r.mode), f(r.centre_up_steps), f(r.centre_down_steps), f(r.height, 4), f(r.width_steps, 1)]
        if mmap.calibrated:
            cells.append(f(r.wavelength_nm, 4))
        t.add_row(*cells)
    Console().print(t)

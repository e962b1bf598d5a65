"""``modetick analyze``: count and refine a logged sweep or a CSV trace."""
from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from daq.errors import fail
from daq.rig import RigError, load_rig, parse_rig
from daq.runlog import LogError, RunLog

HELP = "analyse a run log or a CSV trace (position,intensity): modes, spacing, chip length"


def configure(p) -> None:
    p.add_argument("file", metavar="FILE", help="a modetick run log (.db) or a CSV with position,intensity columns")
    p.add_argument("--config", metavar="RIG", help="rig file for the calibration (default: the log's own rig)")
    p.add_argument("--set", action="append", default=[], metavar="SECTION.KEY=VALUE",
                   help="override a rig key, e.g. counter settings (repeatable)")
    p.add_argument("--json", action="store_true", help="print the result as one JSON object")


def load_input(path: str, config: str | None, overrides: list[str]):
    """(samples-like columns, rig sections or None, log or None) for a log or a CSV."""
    p = Path(path)
    if not p.is_file():
        raise LogError(f"{p}: no such file")
    with open(p, "rb") as fh:
        head = fh.read(16)
    if head.startswith(b"SQLite format 3") or p.suffix.lower() == ".db":
        log = RunLog.open(p)       # a .db that is no SQLite file is a bad log, not a CSV
        rig = load_rig(config, overrides) if config else log_rig(log, overrides)
        s = log.read_samples()
        cols = (s.position_steps, s.value, s.direction, s.pass_index)
        return cols, rig.sections, log
    from analysis.trace_io import read_trace_csv
    try:
        trace = read_trace_csv(p)
    except ValueError as exc:
        raise LogError(str(exc)) from None
    rig = load_rig(config, overrides) if config else None
    if rig is None and overrides:
        # No rig file: overrides still apply to defaults (e.g. counter settings).
        rig = parse_rig("[sweep]\nstart = 0\nstop = 1\nstep = 1\n", "<no rig file>", overrides)
        for k in ("deg_per_step", "angle_at_zero_deg"):
            rig.sections["stage"][k] = None
    # A CSV written by `modetick export` (or by hand) may carry the commanded
    # direction and pass; they beat guessing from the positions.
    cols = (trace["position"], trace["intensity"], _int_col(trace, "direction"), _int_col(trace, "pass"))
    return cols, (rig.sections if rig else None), None


def _int_col(trace: dict, name: str):
    col = trace.get(name)
    if col is None or not np.isfinite(col).all():
        return None
    if name == "direction" and not np.isin(col, (-1, 1)).all():
        raise LogError("CSV column direction must hold only +1 and -1")
    return col.astype(np.int64)


def log_rig(log: RunLog, overrides: list[str]):
    rig = log.rig()
    if overrides:
        rig = parse_rig(rig.text, rig.source, rig.overrides + overrides)
    return rig


def analyze_file(path: str, config: str | None = None, overrides: list[str] | None = None) -> dict:
    """The analysis of a log or CSV as `analyze --json` prints it.

    Raises RigError / LogError (one line each) for unusable input.
    """
    from analysis.pipeline import analyze_trace
    from daq.summary import json_ready
    (pos, val, direction, pass_index), sections, log = load_input(path, config, overrides or [])
    if len(val) == 0:
        raise LogError(f"{path}: holds no samples")
    result = analyze_trace(pos, val, direction=direction, pass_index=pass_index, sections=sections,
                           counter_settings=(sections or {}).get("counter"))
    result = json_ready(dict(result))
    result["samples"] = int(len(val))
    if log is not None:
        result["status"] = log.meta("status")
        result["log"] = str(log.path)
        log.close()
    return result


def run(args) -> int:
    try:
        result = analyze_file(args.file, args.config, args.set)
    except (RigError, LogError, ValueError) as exc:
        return fail(exc, 2)
    if args.json:
        print(json.dumps(result))
    else:
        print_result(result)
    return 0


def print_result(result: dict) -> None:
    from rich.console import Console
    from rich.table import Table
    from rich.text import Text
    con = Console()
    if not con.is_terminal:          # a pipe or a file: wide enough for the budget table
        con = Console(width=140)
    t = Table(title="modetick analyze", show_header=False)
    t.add_column(style="grey62")
    t.add_column()
    pairs = [("modes", "modes"), ("crossings", "blips seen"), ("spacing_steps", "spacing (steps)"),
             ("spacing_nm", "spacing (nm)"), ("wavelength_nm", "wavelength (nm)"),
             ("length_um", "chip length (µm)"), ("backlash_steps", "backlash (steps)")]
    for key, label in pairs:
        v = result.get(key)
        if v is None:
            continue
        u = result.get(f"{key}_u")
        t.add_row(label, f"{v:.6g} ± {u:.2g}" if isinstance(u, float) else (f"{v:.6g}" if isinstance(v, float) else str(v)))
    con.print(t)
    budget = result.get("budget")
    if budget:
        b = Table(title="uncertainty budget (chip length)")
        for col in budget[0].keys():
            b.add_column(str(col))
        for row in budget:
            # Text, not markup: "[chip] group_index" is a rig key, not a style
            b.add_row(*[Text(f"{v:.4g}" if isinstance(v, float) else str(v)) for v in row.values()])
        con.print(b)
    for gap in result.get("gaps") or []:
        con.print(f"[yellow]gap:[/] {gap}")
    for note in result.get("notes") or []:
        con.print(Text("note: ", style="yellow") + Text(note))

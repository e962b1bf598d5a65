"""``modetick export``: a run log as CSV files (samples, events, the mode map)."""
from __future__ import annotations

from daq.cmd_report import add_log_options, open_or_fail, out_dir
from daq.errors import fail

HELP = "export a run log as CSV: samples.csv, events.csv, modes.csv (the mode map)"
FORMATS = ("csv",)


def configure(p) -> None:
    add_log_options(p, "export")
    p.add_argument("--format", default="csv", metavar="FORMAT", help="csv (the only format so far)")


def run(args) -> int:
    from daq.export import export_csv
    if args.format.lower() not in FORMATS:
        return fail(f"export: unknown format {args.format!r}; supported: {', '.join(FORMATS)}", 2)
    analyzed, code = open_or_fail(args, with_crossings=False)
    if analyzed is None:
        return code
    out = out_dir(args, "export")
    try:
        written = export_csv(analyzed.log, out, analyzed.result.get("mode_map") or [])
    except OSError as exc:
        return fail(f"cannot write the export into {out}: {exc}", 2)
    finally:
        analyzed.log.close()
    for path, rows in written.values():
        print(f"{path}  ({rows} rows)")
    return 0

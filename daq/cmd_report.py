"""``modetick report``: figures, summary.json and a Markdown page for one run log."""
from __future__ import annotations

from pathlib import Path

from daq.errors import fail
from daq.rig import RigError
from daq.runlog import LogError

HELP = "write figures (PNG), summary.json and report.md for a run log"


def add_log_options(p, out_default: str) -> None:
    """LOG, --out, --config and --set: what report and export both take."""
    p.add_argument("log", metavar="LOG", help="a modetick run log (.db)")
    p.add_argument("--out", metavar="DIR", help=f"directory to write into (default: <LOG without .db>-{out_default})")
    p.add_argument("--config", metavar="RIG", help="rig file for the analysis (default: the log's own rig)")
    p.add_argument("--set", action="append", default=[], metavar="SECTION.KEY=VALUE",
                   help="override a rig key, e.g. counter settings (repeatable)")


def configure(p) -> None:
    add_log_options(p, "report")


def out_dir(args, suffix: str) -> Path:
    if args.out:
        return Path(args.out)
    p = Path(args.log)
    return p.with_name(f"{p.stem}-{suffix}")


def open_or_fail(args, with_crossings: bool = True):
    """(AnalyzedLog, None), or (None, exit code) after one line on stderr."""
    from daq.report import open_analyzed
    try:
        return open_analyzed(args.log, args.config, args.set, with_crossings), None
    except (RigError, LogError) as exc:
        return None, fail(exc, 2)


def run(args) -> int:
    from daq.report import write_report
    analyzed, code = open_or_fail(args)
    if analyzed is None:
        return code
    out = out_dir(args, "report")
    try:
        written = write_report(analyzed, out)
    except OSError as exc:
        return fail(f"cannot write the report into {out}: {exc}", 2)
    finally:
        analyzed.log.close()
    for p in written["figures"]:
        print(p)
    print(written["summary"])
    print(written["markdown"])
    for note in written["notes"]:
        print(f"note: {' '.join(note.replace('`', '').split())}")
    return 0

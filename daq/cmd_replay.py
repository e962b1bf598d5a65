"""``modetick replay``: a logged sweep through the counter again, at its pace or faster."""
from __future__ import annotations

import json
import sys
import threading

from daq.errors import fail
from daq.rig import RigError, parse_rig
from daq.runlog import LogError, RunLog

HELP = ("feed a run log through the counter and dashboard again (recorded pace, --speed X, or --fast), "
        "optionally with other counter settings, and say what changed")

# Above this many samples the summary keeps the counter's own spacing instead
# of the offline refinement, which holds the whole log in memory.
REFINE_MAX_SAMPLES = 2_000_000
SHOWN = 10   # modes gained/lost listed in the table view


def configure(p) -> None:
    p.add_argument("log_file", metavar="LOG", help="a modetick run log (.db)")
    pace = p.add_mutually_exclusive_group()
    pace.add_argument("--speed", type=float, metavar="X", help="replay X times faster than recorded (default 1)")
    pace.add_argument("--fast", action="store_true", help="as fast as possible")
    p.add_argument("--set", action="append", default=[], metavar="SECTION.KEY=VALUE",
                   help="override a rig key for the replay, e.g. counter settings (repeatable)")
    p.add_argument("--json", action="store_true", help="print the result as one JSON object on stdout")
    p.add_argument("--log", metavar="NEWLOG", help="write the replay as a new run log")
    p.add_argument("--no-refine", action="store_true",
                   help="skip the offline refinement: spacing from the counter itself "
                        f"(automatic above {REFINE_MAX_SAMPLES:,} samples)")
    p.add_argument("--plain", action="store_true", help="plain progress lines even on a terminal")


# What a replay of logged samples can change: the counter, and the calibration the
# figures in nm and the chip length come from; the rest (sweep, devices, limits) made
# the samples and is fixed by them.
REPLAY_SECTIONS = ("counter", "chip", "grating")
REPLAY_STAGE_KEYS = ("deg_per_step", "deg_per_step_u", "angle_at_zero_deg", "angle_at_zero_deg_u",
                     "calibrated_moving")


def replay_rig(log: RunLog, overrides: list[str]):
    """The rig as logged, or re-read from its text with more overrides."""
    rig = log.rig()
    if not overrides:
        return rig
    for item in overrides:
        section, _, rest = item.partition(".")
        key = rest.split("=", 1)[0].strip()
        if section.strip() not in REPLAY_SECTIONS and not (section.strip() == "stage" and key in REPLAY_STAGE_KEYS):
            raise RigError(f"of the replay of {log.path}", f"--set {item}",
                           "a replay re-reads the logged samples: only counter.*, chip.*, grating.* and the "
                           "stage calibration (deg_per_step, angle_at_zero_deg and their _u, calibrated_moving) "
                           "can change")
    if not rig.text:
        raise LogError(f"log {log.path}: holds no rig text to apply --set to")
    return parse_rig(rig.text, rig.source, rig.overrides + overrides)


def summarise(log: RunLog, sections: dict, status: str, counter, refine: bool) -> dict:
    """The same keys as ``sweep --json``; the spacing refined offline when ``refine``."""
    from daq.summary import build_summary, live_summary
    if not refine:
        return live_summary(log, sections, status, counter)
    out = build_summary(log, sections, status, counter=counter)
    out["refined"] = True
    return out


def run(args) -> int:
    from analysis.counter import StreamCounter
    from daq.cmd_sweep import EXIT_FOR_SIGNAL, SignalStop
    from daq.dashboard import KeyReader, PlainView, TerminalView
    from daq.engine import LiveState
    from daq.replay import Blips, Replay, changes

    if args.speed is not None and not args.speed > 0:
        return fail(f"--speed {args.speed}: must be a positive factor", 2)
    out_log = None
    try:
        log = RunLog.open(args.log_file)
        rig = replay_rig(log, args.set)
        if log.n_samples == 0:
            return fail(f"log {log.path}: holds no samples", 2)
        if args.log:
            out_log = RunLog.create(args.log, rig)
            out_log.set_meta(replay_of=str(log.path), status="running")
    except (RigError, LogError) as exc:
        return fail(exc, 2)

    speed = None if args.fast else (args.speed or 1.0)
    state = LiveState(log_path=str(log.path), title="modetick replay")
    state.status = "replaying " + ("fast" if speed is None else f"x{speed:g}")
    try:
        from daq.cmd_sweep import _calibration_view
        state.calib = _calibration_view(rig.sections)
    except ImportError:
        pass
    try:
        counter = StreamCounter(rig["counter"])
    except ValueError as exc:  # e.g. a log from a version with other counter settings
        return fail(f"log {log.path}: counter settings: {exc}", 2)
    stopper = SignalStop(state)
    pause = threading.Event()
    player = Replay(log, rig, counter, state, speed=speed, out_log=out_log,
                    stop_flag=lambda: stopper.signum is not None, pause_flag=pause)
    tty = sys.stdout.isatty() and not args.json and not args.plain
    view = TerminalView(state) if tty else PlainView(state)
    code = 0
    try:
        with stopper, view:
            if tty:
                with KeyReader(pause, stopper.request):
                    status = player.run()
            else:
                status = player.run()
    except KeyboardInterrupt:
        status = "aborted"
    except LogError as exc:
        return fail(exc, 2)
    if status != "finished":
        code = EXIT_FOR_SIGNAL.get(stopper.signum, 130)
    state.status = status

    refine = not args.no_refine and status == "finished" and log.n_samples <= REFINE_MAX_SAMPLES
    if not refine and not args.no_refine and status == "finished":
        print(f"modetick: {log.n_samples:,} samples: spacing from the counter, not refined offline "
              f"(run `modetick analyze` for that)", file=sys.stderr)
    result = summarise(out_log or log, rig.sections, status, counter, refine)
    result["replay_of"] = str(log.path)
    result["samples_replayed"] = player.samples_done
    result["replay_s"] = round(player.wall_s, 3)
    result["msamples_per_s"] = round(player.samples_done / player.wall_s / 1e6, 2) if player.wall_s > 0 else None
    if args.set:
        result["settings"] = list(args.set)
    logged = log.summary()
    if logged and "truth" in logged:
        result["truth"] = logged["truth"]   # the simulator's answer for these very samples
    result["changes"] = changes(logged, Blips.from_log(log), result, player.blips)
    if out_log is not None:
        out_log.finish(status, result, "" if status == "finished" else f"replay {status}")
        out_log.close()
    log.close()
    if args.json:
        # As `sweep --json`: the mode map stays in the log (and `modetick modes`).
        print(json.dumps({k: v for k, v in result.items() if k != "mode_map"}))
    else:
        print_result(result)
    return code


def print_result(result: dict) -> None:
    from rich.console import Console
    from rich.table import Table
    con = Console()
    ch = result["changes"]
    logged = ch.get("logged", {})
    t = Table(title=f"modetick replay of {result['replay_of']}")
    for col in ("", "logged run", "replay"):
        t.add_column(col)
    for key in ("modes", "crossings", "spacing_steps", "spacing_nm", "wavelength_nm", "length_um"):
        if key not in result and key not in logged:
            continue
        fmt = lambda v: "…" if v is None else (f"{v:.6g}" if isinstance(v, float) else str(v))  # noqa: E731
        t.add_row(key, fmt(logged.get(key)), fmt(result.get(key)))
    con.print(t)
    if ch.get("note"):       # nothing to compare with: every blip would be listed as gained
        con.print(ch["note"])
        con.print(f"{result['samples']:,} samples in {result['replay_s']:.2f} s")
        return
    if ch["identical"]:
        con.print("same count as the logged run, blip for blip")
    for word, key in (("lost", "modes_lost"), ("gained", "modes_gained")):
        for m in ch[key][:SHOWN]:
            con.print(f"mode {word}: {m['mode']} at {', '.join(f'{p:g}' for p in m['positions_steps'])} steps")
        if len(ch[key]) > SHOWN:
            con.print(f"... {len(ch[key]) - SHOWN} more modes {word} (--json lists them)")
    for word, key in (("split over two replayed modes", "modes_split"), ("merged into one", "modes_merged")):
        if ch.get(key):
            con.print(f"modes {word}: {', '.join(map(str, ch[key][:SHOWN]))}")
    con.print(f"blips lost {ch['blips_lost']}, gained {ch['blips_gained']}; "
              f"{result['samples']:,} samples in {result['replay_s']:.2f} s")

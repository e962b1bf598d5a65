"""``modetick sweep``: run a sweep, count modes live, log everything, summarise."""
from __future__ import annotations

import json
import logging
import signal
import sys
import threading
from pathlib import Path

from daq.errors import fail
from daq.rig import RigError, load_rig, reconnect
from daq.runlog import LogError, RunLog, default_log_path

HELP = "run a sweep (the simulated rig unless --config names another) and count modes live"

# Exit codes for a run stopped by a signal: 128 + signal number (shell convention).
EXIT_FOR_SIGNAL = {signal.SIGINT: 130, signal.SIGTERM: 143}


def configure(p) -> None:
    p.add_argument("--config", metavar="RIG", help="rig file (TOML); default: the simulated rig configs/sim.toml")
    p.add_argument("--log", metavar="FILE", help="run log to write (SQLite); default runs/<UTC time>.db")
    p.add_argument("--json", action="store_true", help="print the summary as one JSON object on stdout")
    p.add_argument("--set", action="append", default=[], metavar="SECTION.KEY=VALUE",
                   help="override a rig-file key for this run (repeatable)")
    p.add_argument("--resume", metavar="LOG", help="continue an interrupted run from its log")
    p.add_argument("--plain", action="store_true", help="plain progress lines even on a terminal")


class SignalStop:
    """First SIGINT/SIGTERM: finish the step, stop, exit 128+n. Second: abort now."""

    def __init__(self, state):
        self.signum: int | None = None
        self.by_key = False          # stopped with the dashboard's q key, not a signal
        self.state = state
        self._old = {}

    engine = None   # set once the engine exists: its hand-over section defers the abort

    def __call__(self, signum, frame) -> None:
        if self.signum is not None:
            if self.engine is not None and self.engine.critical:
                self.engine.abort_pending = True
                return
            raise KeyboardInterrupt
        self.signum = signum
        self.state.status = "stopping"

    def request(self) -> None:
        if self.signum is None:
            self.signum, self.by_key = signal.SIGINT, True     # exits as Ctrl-C does (130)
            self.state.status = "stopping"

    def __enter__(self):
        for s in EXIT_FOR_SIGNAL:
            self._old[s] = signal.signal(s, self)
        return self

    def __exit__(self, *exc):
        for s, h in self._old.items():
            signal.signal(s, h)
        return False


class _InterruptsRaise:
    """SIGINT and SIGTERM raise KeyboardInterrupt inside the block (handlers restored after)."""

    def __enter__(self):
        def handler(signum, frame):
            raise KeyboardInterrupt
        self._old = {s: signal.signal(s, handler) for s in EXIT_FOR_SIGNAL}
        return self

    def __exit__(self, *exc):
        for s, h in self._old.items():
            signal.signal(s, h)
        return False


class _InterruptsHeld(_InterruptsRaise):
    """SIGINT and SIGTERM are ignored inside the block (stopping motion, writing the log's end)."""

    def __enter__(self):
        self._old = {s: signal.signal(s, lambda signum, frame: None) for s in EXIT_FOR_SIGNAL}
        return self


def _quick_summary(log, sections, status, counter) -> dict:
    """The counter's own figures, for when the offline summary was interrupted."""
    from daq.summary import live_summary
    try:
        return live_summary(log, sections, status, counter)
    except Exception:  # noqa: BLE001 - the counter was cut off mid-way: keep what is certain
        return {"status": status, "samples": log.n_samples, "log": str(log.path)}


def _calibration_view(sections):
    """callable(spacing_steps, u) -> dict for the dashboard, or None when uncalibrated."""
    try:
        from analysis.physics import live_calibration
    except ImportError:
        return None
    return lambda sp, u, centre_steps=None, backlash_steps=None: live_calibration(
        sp, u, sections, centre_steps, backlash_steps)


def run(args) -> int:
    from analysis.counter import StreamCounter
    from daq import schedule
    from daq.dashboard import KeyReader, PlainView, TerminalView
    from daq.engine import Engine, LiveState
    from daq.summary import build_summary
    from drivers.base import DeviceError
    from drivers.registry import open_devices

    resume_log = None
    try:
        if args.resume:
            if args.config or args.log:
                return fail("--resume takes the rig and the log from LOG; leave out --config and --log", 2)
            resume_log = RunLog.open(args.resume, writable=True)
            rig = resume_log.rig()
            if args.set:      # only where the devices are plugged in (daq.rig.CONNECTION_KEYS)
                rig = reconnect(rig, args.set)
        else:
            rig = load_rig(args.config, args.set)
    except (RigError, LogError) as exc:
        return fail(exc, 2)

    state = LiveState()
    stopper = SignalStop(state)
    pause = threading.Event()
    try:
        stage, detector, bench = open_devices(rig.sections)
    except DeviceError as exc:
        return fail(exc, 1)
    except OSError as exc:
        return fail(f"cannot open devices: {exc}", 1)
    except KeyboardInterrupt:
        return fail("interrupted while opening the devices; nothing was moved", 130)

    status, reason, code = "finished", "", 0
    log = engine = counter = None
    try:
        if resume_log is not None:
            log = resume_log
            counter = _resumed_counter(log, StreamCounter)
            skip = log.n_samples
            if args.set:        # the next resume finds the devices where they are now
                log.set_meta(rig_json=rig.to_json())
        else:
            path = Path(args.log) if args.log else default_log_path()
            log = RunLog.create(path, rig, unique=not args.log)
            counter = StreamCounter(rig["counter"])
            skip = 0
        state.log_path = str(log.path)
        state.calib = _calibration_view(rig.sections)
        t0 = 0.0
        if skip:
            s_last = log.read_samples()
            t0 = float(s_last.t_s[-1]) if len(s_last) else 0.0
        engine = Engine(rig, stage, detector, counter, log, state,
                        stop_flag=lambda: stopper.signum is not None, pause_flag=pause, t0_s=t0)
        stopper.engine = engine
        if skip:
            if log.meta("status") == "finished" or (
                    rig["sweep"]["mode"] != "scan" and skip >= schedule.recorded_count(rig["sweep"])):
                return fail(f"log {log.path}: the run is already complete", 2)
            # before anything can fail: the restored counter counts these again
            log.drop_provisional_events()
            if rig["sweep"]["mode"] == "scan":
                engine._resume_pass = int(s_last.pass_index[-1])
                engine._resume_pos = int(s_last.position_steps[-1])
            else:
                engine.reapproach(skip)
            engine.passes_announced = len(log.events("pass"))
            engine.note("status", f"resumed after {skip} samples"
                                  + (f", devices now at {', '.join(args.set)}" if args.set else ""))
        log.set_meta(status="running")
        _route_warnings(engine)
        tty = sys.stdout.isatty() and not args.json and not args.plain
        view = TerminalView(state) if tty else PlainView(state)
        keys = KeyReader(pause, stopper.request) if tty else None
        with stopper, view:
            if keys:
                with keys:
                    status = engine.run(skip)
            else:
                status = engine.run(skip)
            with _InterruptsHeld():        # a few ms; the last frame shows the last blips too
                engine.finish_counting()
            state.status = status          # the dashboard's last frame says how it ended
        if status == "stopped":
            code = EXIT_FOR_SIGNAL.get(stopper.signum, 130)
            name = signal.Signals(stopper.signum).name
            reason = ("stopped with the q key" if stopper.by_key
                      else f"stopped by Ctrl-C ({name})" if stopper.signum == signal.SIGINT
                      else f"stopped by {name}")
    except KeyboardInterrupt:
        status, reason, code = "aborted", "aborted by a second interrupt", 130
    except DeviceError as exc:
        status, reason, code = "faulted", str(exc), 1
        if log is not None:
            log.append_events([(log.n_samples, state.t_s, "fault", state.position_steps,
                                None, None, None, None, reason)], commit=True)
    except LogError as exc:
        return fail(exc, 2)
    except Exception as exc:  # noqa: BLE001 - a bug or an unexpected I/O error: keep the log honest
        status, reason, code = "faulted", f"unexpected error: {exc.__class__.__name__}: {exc}", 1
    finally:
        with _InterruptsHeld():          # stopping the motion is never cut short
            _safe_stop(stage, detector)

    state.status = status
    if log is None or engine is None:
        return fail(reason or "interrupted before the run started", code or 1)
    # The offline summary can take a few seconds; an interrupt during it (a second
    # Ctrl-C, a SIGTERM) skips it, keeps the counter's own figures and still closes
    # the log properly, and the closing itself is never interrupted.
    try:
        with _InterruptsRaise():
            engine.finish_counting()
            summary = build_summary(log, rig.sections, status, counter=counter, bench=bench, reason=reason)
    except KeyboardInterrupt:
        reason = (f"{reason}; " if reason else "") + "offline summary skipped (interrupted)"
        code = code or 130
        with _InterruptsHeld():
            summary = _quick_summary(log, rig.sections, status, counter)
    with _InterruptsHeld():
        log.finish(status, summary, reason)
        log.close()
    if args.json:
        # The mode map is in the log (and `modetick modes`); keep stdout to the results.
        print(json.dumps({k: v for k, v in summary.items() if k != "mode_map"}))
    else:
        _print_table(summary)
    if code == 1:
        fail(reason, 1)
    return code


class _WarningsToEvents(logging.Handler):
    """Driver warnings (logging, under "modetick") become logged events and dashboard lines."""

    def __init__(self, engine):
        super().__init__(logging.WARNING)
        self.engine = engine

    def emit(self, record: logging.LogRecord) -> None:
        self.engine.note("warning", record.getMessage())


def _route_warnings(engine) -> None:
    logger = logging.getLogger("modetick")
    for h in list(logger.handlers):
        if isinstance(h, _WarningsToEvents):
            logger.removeHandler(h)
    logger.addHandler(_WarningsToEvents(engine))


def _resumed_counter(log, cls):
    blob = log.meta("counter_state")
    if not blob and log.n_samples == 0:
        return cls(log.rig()["counter"])     # killed before its first commit: start afresh
    if not blob:
        raise LogError(f"log {log.path}: holds no counter state to resume from")
    return cls.from_state(json.loads(blob))


def _safe_stop(stage, detector) -> None:
    for fn in (stage.stop, stage.close, detector.close):
        try:
            fn()
        except Exception:  # noqa: BLE001 - best effort on the way out
            pass


def _print_table(summary: dict) -> None:
    from rich.console import Console
    from rich.table import Table
    from rich.text import Text

    from daq.summary import summary_rows
    t = Table(title="modetick sweep", show_header=False)
    t.add_column(style="grey62", no_wrap=True)
    t.add_column()
    for label, value in summary_rows(summary):
        t.add_row(label, Text(value))          # plain text: "[chip] group_index" is not markup
    con = Console(stderr=False)
    con.print(t)
    for note in summary.get("notes") or []:
        con.print(Text("note: ", style="yellow") + Text(note))
    if summary.get("status") in ("stopped", "aborted", "faulted"):
        con.print(f"to go on: modetick sweep --resume {summary.get('log', 'LOG')}")
    con.print("every figure, the budget and the mode map: --json, modetick analyze / report / modes")

"""``modetick park``: put the grating back on one mode of a logged map and check the blip is there."""
from __future__ import annotations

import json
import math
import sys
import time
from dataclasses import dataclass

import numpy as np

from daq.errors import fail
from daq.rig import RigError, load_rig
from daq.runlog import LogError, RunLog

HELP = ("move the stage to the centre of mode K of a logged map, approaching from the side the map "
        "was made from, and check the blip is there. The laser stays on: eyewear on, beam blocked")

PARK_SAFETY = ("Before parking: the laser is on while the grating moves and afterwards; wear eyewear "
               "rated for the wavelength, keep the beam blocked or enclosed, and check the soft limits "
               "([stage] min_steps/max_steps) of the rig file; your laser safety officer's rules come first.")
MIN_TAKEUP_STEPS = 50
BLIP_FRACTION = 0.5      # the blip is "there" when the reading rises this far of the recorded rise
BLIP_MIN_SIGMA = 3.0     # ... and at least this many recorded spreads above the baseline


def configure(p) -> None:
    p.add_argument("log_file", metavar="LOG", help="the run log whose mode map to use")
    p.add_argument("--mode", type=int, required=True, metavar="K", help="mode number, as `modetick modes LOG` lists it")
    p.add_argument("--config", metavar="RIG", required=True, help="rig file of the bench to move (TOML)")
    p.add_argument("--set", action="append", default=[], metavar="SECTION.KEY=VALUE",
                   help="override a rig-file key (repeatable)")
    p.add_argument("--from", dest="side", choices=("up", "down"),
                   help="approach moving up or down (default: the direction the map was made in, its first pass)")
    p.add_argument("--takeup", type=int, metavar="STEPS",
                   help=f"distance to go past on the near side first (default: twice the backlash, at least {MIN_TAKEUP_STEPS})")
    p.add_argument("--reads", type=int, default=5, metavar="N", help="detector reads averaged at the mode (default 5)")
    p.add_argument("--json", action="store_true", help="print the result as one JSON object")
    p.epilog = PARK_SAFETY + "  " + (p.epilog or "")


def approach(stage, target_steps: int, direction: int, takeup_steps: int,
             min_steps: int | None, max_steps: int | None) -> tuple[int, str | None]:
    """Go to target - direction * takeup (inside the soft limits), then to the target.

    The last move then runs in ``direction`` over at least the take-up
    distance, so the play of the mount is taken up the same way as when the
    map was made (common practice). Returns (the near point, a warning or None).
    """
    near = target_steps - direction * takeup_steps
    warn = None
    if min_steps is not None and near < min_steps:
        near = min_steps
    if max_steps is not None and near > max_steps:
        near = max_steps
    if abs(target_steps - near) < takeup_steps:
        warn = (f"the soft limit shortens the take-up to {abs(target_steps - near)} steps "
                f"(asked {takeup_steps}); the backlash may not be fully taken up")
    stage.move_to(near)
    stage.move_to(target_steps)
    return near, warn


@dataclass
class Recorded:
    """What the log recorded around one mode, moving one way."""

    baseline: float        # floor between the blips: 5th percentile within half a spacing
    peak: float            # median reading at the recorded position nearest the centre, all passes that way
    noise: float | None    # spread (standard deviation) of those readings; None with a single pass
    position_steps: float  # that recorded position


def recorded_levels(log: RunLog, centre_steps: float, direction: int, half_window_steps: float) -> Recorded:
    """Baseline, peak and repeatability at a mode, from the logged samples (read block by block)."""
    pos, val = [], []
    for b in log.iter_blocks():
        way = (b.direction > 0) if direction > 0 else (b.direction < 0)
        sel = way & (np.abs(b.position_steps - centre_steps) <= half_window_steps)
        pos.append(b.position_steps[sel])
        val.append(b.value[sel])
    p, v = np.concatenate(pos), np.concatenate(val)
    if v.size < 3:
        raise LogError(f"log {log.path}: no samples recorded at {centre_steps:.1f} steps moving "
                       f"{'up' if direction > 0 else 'down'}")
    nearest = p[np.argmin(np.abs(p - centre_steps))]
    at = v[p == nearest]
    noise = float(np.std(at, ddof=1)) if at.size >= 2 else None
    return Recorded(float(np.percentile(v, 5)), float(np.median(at)), noise, float(nearest))


def blip_verdict(reading: float, rec: Recorded) -> tuple[bool, float]:
    """(blip there?, the reading's rise above the baseline as a fraction of the recorded rise)."""
    rise, recorded_rise = reading - rec.baseline, rec.peak - rec.baseline
    fraction = rise / recorded_rise if recorded_rise > 0 else math.nan
    enough = fraction >= BLIP_FRACTION
    if rec.noise:
        enough = enough and rise >= BLIP_MIN_SIGMA * rec.noise
    return bool(enough), fraction


def run(args) -> int:
    from daq.cmd_modes import MapError, load_mode_map
    from daq.cmd_sweep import _safe_stop
    from drivers.base import DeviceError, LimitError
    from drivers.registry import open_devices

    if args.reads < 1:
        return fail("--reads must be at least 1", 2)
    if args.takeup is not None and args.takeup < 0:
        return fail("--takeup must not be negative", 2)
    try:
        log = RunLog.open(args.log_file)
        mmap = load_mode_map(log)
        rig = load_rig(args.config, args.set)
    except (LogError, RigError, MapError) as exc:
        return fail(exc, 2)
    side = {"up": 1, "down": -1}[args.side] if args.side else mmap.direction
    word = "up" if side > 0 else "down"
    row = mmap.row(args.mode)
    if row is None:
        return fail(f"mode {args.mode}: not in the map of {log.path} (modes {mmap.span()}; "
                    f"`modetick modes {log.path}` lists them)", 2)
    centre = row.centre(side)
    if centre is None:
        return fail(f"mode {args.mode}: the map has no centre for it moving {word}; try --from "
                    f"{'down' if side > 0 else 'up'}", 2)
    target = int(round(centre))
    lo, hi = rig["stage"]["min_steps"], rig["stage"]["max_steps"]
    if (lo is not None and target < lo) or (hi is not None and target > hi):
        return fail(f"mode {args.mode}: its centre {target} steps is outside the soft limits "
                    f"[{lo}, {hi}] of {rig.source}; nothing moved", 2)
    backlash = mmap.backlash_steps or 0.0
    takeup = args.takeup if args.takeup is not None else max(MIN_TAKEUP_STEPS, int(math.ceil(2 * abs(backlash))))
    try:
        rec = recorded_levels(log, centre, side, 0.5 * (mmap.spacing_steps or 2 * MIN_TAKEUP_STEPS))
    except LogError as exc:
        return fail(exc, 2)

    print(f"modetick: {PARK_SAFETY}", file=sys.stderr)
    try:
        stage, detector, _bench = open_devices(rig.sections, write_setpoints=False)
    except DeviceError as exc:
        return fail(exc, 1)
    except OSError as exc:
        return fail(f"cannot open devices: {exc}", 1)
    try:
        near, warn = approach(stage, target, side, takeup, lo, hi)
        if warn:
            print(f"modetick: warning: {warn}", file=sys.stderr)
        if rig["sweep"]["settle_s"]:
            time.sleep(rig["sweep"]["settle_s"])
        values = [detector.read().value for _ in range(args.reads)]
        position = stage.position_steps()
    except LimitError as exc:
        return fail(exc, 2)
    except DeviceError as exc:
        return fail(exc, 1)
    except KeyboardInterrupt:
        return fail("interrupted; the stage was stopped", 130)
    finally:
        _safe_stop(stage, detector)
        log.close()

    reading = sum(values) / len(values)
    there, fraction = blip_verdict(reading, rec)
    result = {
        "mode": args.mode, "direction": word, "target_steps": target, "position_steps": position,
        "takeup_from_steps": near, "reading": reading, "reads": len(values),
        "recorded_baseline": rec.baseline, "recorded_peak": rec.peak, "recorded_spread": rec.noise,
        "mapped_height": row.height, "fraction_of_recorded": None if math.isnan(fraction) else fraction,
        "blip_there": there, "wavelength_nm": row.wavelength_nm, "log": str(log.path), "rig": rig.source,
    }
    if args.json:
        print(json.dumps(result))
    else:
        lam = f" ({row.wavelength_nm:.3f} nm)" if row.wavelength_nm is not None else ""
        print(f"parked on mode {args.mode}{lam} at {position} steps, approached moving {word} from {near}")
        print(f"reading {reading:.6g}; the log recorded {rec.peak:.6g} here over a baseline of {rec.baseline:.6g}: "
              + ("the blip is there" if there else "NO blip here (drift, a slipped mount, or the laser is off?)"))
    return 0 if there else 1

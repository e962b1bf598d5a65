"""``modetick simulate``: a simulated sweep straight from the physics, without the engine.

The rig's [sweep] schedule runs through ``sims.trace.simulate_trace`` in one
go (millions of samples per second) and goes to a CSV (``position,intensity``
plus direction, pass and simulated time) or to a run log that ``modetick
analyze``/``report`` read like a real one. ``--json`` prints the simulator's
truth: what a perfect counter would find.
"""
from __future__ import annotations

import json
import sys
from pathlib import Path

from daq.errors import fail
from daq.rig import RigError, load_rig
from daq.runlog import LogError, RunLog

HELP = "write a simulated sweep (CSV or run log) from the simulator's physics, without the engine"

CSV_COLUMNS = ("position", "intensity", "direction", "pass", "time_s")
BLOCK = 65536


def configure(p) -> None:
    p.add_argument("--config", metavar="RIG", help="rig file (TOML); default: the simulated rig configs/sim.toml")
    p.add_argument("--set", action="append", default=[], metavar="SECTION.KEY=VALUE",
                   help="override a rig-file key, e.g. sim.scenario=\"kicks\" or sim.seed=3 (repeatable)")
    p.add_argument("--out", metavar="FILE",
                   help="where to write: FILE.csv for a CSV, any other name for a run log (SQLite)")
    p.add_argument("--samples", type=int, metavar="N",
                   help="simulate exactly N samples, passes alternating beyond [sweep] passes")
    p.add_argument("--json", action="store_true", help="print the simulator's truth as one JSON object")
    p.add_argument("--list", action="store_true", help="list the built-in scenarios and exit")


def _write_csv(path: Path, trace, time_s) -> None:
    with open(path, "w", encoding="utf-8", newline="") as fh:
        fh.write(",".join(CSV_COLUMNS) + "\n")
        for i in range(0, trace.value.size, BLOCK):
            sl = slice(i, i + BLOCK)
            cols = ([str(v) for v in trace.position_steps[sl].tolist()],
                    [repr(v) for v in trace.value[sl].tolist()],
                    [str(v) for v in trace.direction[sl].tolist()],
                    [str(v) for v in trace.pass_index[sl].tolist()],
                    [f"{t:.6f}" for t in time_s[sl].tolist()])
            fh.writelines(",".join(r) + "\n" for r in zip(*cols))


def _write_log(path: Path, rig, trace, time_s) -> None:
    log = RunLog.create(path, rig, status="running")
    try:
        for i in range(0, trace.value.size, BLOCK):
            sl = slice(i, i + BLOCK)
            log.append_samples(time_s[sl], trace.position_steps[sl], trace.direction[sl],
                               trace.pass_index[sl], trace.value[sl], commit=False)
        log.commit()
        summary = _summary(log, rig)
        log.finish("finished", summary, reason="simulated by modetick simulate")
    finally:
        log.close()


def _summary(log: RunLog, rig) -> dict:
    """The same summary a sweep writes (counted offline), with the truth beside it."""
    from sims.instruments import SimBench
    bench = SimBench(rig.sections)
    try:
        from daq.summary import build_summary
        return build_summary(log, rig.sections, "finished", bench=bench)
    except ImportError:  # analysis not importable: keep the samples and the truth
        t = bench.truth()
        return {"samples": log.n_samples, "status": "finished",
                "truth": {k: t.get(k) for k in ("modes", "spacing_steps", "spacing_nm", "length_um",
                                                "group_index", "wavelength_nm")}}


def run(args) -> int:
    from sims.scenarios import SCENARIOS
    if args.list:
        width = max(map(len, SCENARIOS))
        for name, sc in SCENARIOS.items():
            print(f"{name:<{width}}  {sc['description']}")
        return 0
    if args.samples is not None and args.samples < 1:
        return fail("--samples must be at least 1", 2)
    try:
        rig = load_rig(args.config, args.set)
    except RigError as exc:
        return fail(exc, 2)
    from sims.model import SimModel
    from sims.trace import sample_times_s, simulate_trace
    from sims.truth import compute_truth
    try:
        model = SimModel(rig.sections)
    except ValueError as exc:
        return fail(f"rig file {rig.source}: {exc}", 2)
    trace = simulate_trace(rig.sections, args.samples, model=model)
    time_s = sample_times_s(model, trace.value.size)
    truth = compute_truth(model)
    if args.out:
        out = Path(args.out)
        try:
            if out.suffix.lower() == ".csv":
                _write_csv(out, trace, time_s)
            else:
                _write_log(out, rig, trace, time_s)
        except LogError as exc:
            return fail(exc, 2)
        except OSError as exc:        # a path that cannot be written: bad input, not a device
            return fail(f"cannot write {out}: {exc}", 2)
    if args.json:
        print(json.dumps(truth))
    else:
        p = model.params
        where = f"wrote {trace.value.size} samples to {args.out}" if args.out else \
            f"simulated {trace.value.size} samples (nothing written: add --out FILE)"
        print(f"{where}; scenario {p['scenario']}, seed {p['seed']}; truth: {truth['modes']} modes, "
              f"{truth['spacing_steps']:.3f} steps = {truth['spacing_nm']:.5f} nm apart, "
              f"chip {truth['length_um']:.2f} um, n_g {truth['group_index']:.3f}", file=sys.stdout)
    return 0

"""Accuracy table: every built-in simulated scenario counted and analysed against its truth.

    python tests/bench/scenarios.py [--seed N] [--passes N]

Not part of the test suite (tests/test_sims_counting.py asserts the bars); this prints the
figures for notes and reviews.
"""
from __future__ import annotations

import argparse
import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from analysis.pipeline import analyze_trace  # noqa: E402
from daq.rig import load_rig  # noqa: E402
from sims.instruments import SimBench  # noqa: E402
from sims.scenarios import SCENARIOS  # noqa: E402
from sims.trace import simulate_trace  # noqa: E402


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--passes", type=int, default=2)
    args = ap.parse_args()
    print("| scenario | modes (truth) | spacing_steps err % | spacing_nm err % | length_um (truth) |")
    print("|---|---|---|---|---|")
    for name in SCENARIOS:
        rig = load_rig(None, [f'sim.scenario="{name}"', f"sim.seed={args.seed}", f"sweep.passes={args.passes}"])
        tr = simulate_trace(rig.sections)
        t = SimBench(rig.sections).truth()
        r = analyze_trace(tr.position_steps, tr.value, tr.direction, tr.pass_index, rig.sections, rig["counter"])
        sp = 100 * (r["spacing_steps"] / t["spacing_steps"] - 1) if r["spacing_steps"] else float("nan")
        nm = 100 * (r["spacing_nm"] / t["spacing_nm"] - 1) if r["spacing_nm"] else float("nan")
        L = f"{r['length_um']:.1f} ± {r['length_um_u']:.1f} ({t['length_um']:.2f})" if r["length_um"] else "-"
        print(f"| {name} | {r['modes']} ({t['modes']}) | {sp:+.3f} | {nm:+.3f} | {L} |")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

"""The counter's kernels built ahead of time against numba's JIT of the same source.

The suite runs on whichever path a process loads (the ahead-of-time build
after an install with a C compiler); these tests run the other path in a
process of its own and hold the two to the same events, bit for bit.
"""
from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from analysis import compiled

ROOT = Path(__file__).resolve().parents[1]

# Counts a tracegen trace (a model of the tests' own) and prints the events and
# the estimate as JSON: run under both kernel builds, the output must be identical.
COUNT = r"""
import json, sys
from dataclasses import asdict
from analysis import compiled
from analysis.counter import StreamCounter
from tests.tracegen import Spec, make_trace
out = {"mode": compiled.MODE, "runs": []}
for spec in (Spec(seed=31, n_modes=30, spacing_steps=40, passes=3, backlash_steps=20, snr=12,
                  kick_rate=3e-3, split_depth=0.7, spike_rate=2e-3, short_reversals=2, drift=1.0),
             Spec(seed=32, n_modes=25, spacing_steps=60, downward=True, reads_per_step=2,
                  clip_frac=0.7, adc_bits=12, snr=20)):
    tr = make_trace(spec)
    c = StreamCounter()
    ev = []
    for a in range(0, tr.value.size, 1500):
        ev += c.feed(tr.position[a:a + 1500], tr.direction[a:a + 1500], tr.value[a:a + 1500])
    ev += c.finish()
    out["runs"].append({"events": [list(e) for e in ev], "estimate": c.estimate(),
                        "state": c.get_state()})
print(json.dumps(out, default=float))
"""


def _count_in(mode: str | None, pythonpath: Path = ROOT) -> dict:
    env = {k: v for k, v in os.environ.items() if k != compiled.ENV_MODE}
    if mode:
        env[compiled.ENV_MODE] = mode
    env["PYTHONPATH"] = str(pythonpath)
    r = subprocess.run([sys.executable, "-c", COUNT], cwd=ROOT, env=env, capture_output=True,
                       text=True, timeout=300)
    assert r.returncode == 0, r.stderr
    return json.loads(r.stdout)


needs_build = pytest.mark.skipif(compiled.AOT is None, reason="no ahead-of-time build of the kernels "
                                 "loaded here (python -m analysis.build_kernels makes one)")


@needs_build
def test_the_ahead_of_time_build_counts_exactly_as_the_jit():
    aot, jit = _count_in(None), _count_in("jit")
    assert (aot["mode"], jit["mode"]) == ("aot", "jit")
    assert sum(len(r["events"]) for r in aot["runs"]) > 100
    assert aot["runs"] == jit["runs"]


@needs_build
def test_a_wrong_argument_type_is_refused_not_read_as_raw_memory():
    from analysis import signal_kernels as kern
    out = np.empty(4)
    kern.grey_opening(np.arange(4.0), 3, out)              # as built: fine
    with pytest.raises(TypeError, match="grey_opening"):
        kern.grey_opening(np.arange(4.0, dtype=np.float32), 3, out)
    with pytest.raises(TypeError, match="grey_opening"):
        kern.grey_opening(np.arange(8.0)[::2], 3, out)     # strided where contiguous was built
    with pytest.raises(TypeError, match="grey_opening"):
        kern.grey_opening(np.arange(4.0), 3.0, out)             # a float where an integer was built
    with pytest.raises(TypeError, match="grey_opening"):
        kern.grey_opening(np.arange(4.0), True, out)            # nor a bool for it
    with pytest.raises(TypeError, match="grey_opening"):
        kern.grey_opening(np.arange(4.0), 3)                    # an argument short
    with pytest.raises(TypeError, match="check_chunk"):
        kern.check_chunk(np.ones(3, np.int32), np.ones(3))      # none of the three built


@needs_build
def test_an_edited_kernel_source_is_not_run_from_a_stale_build(tmp_path):
    # A copy of the package whose kernel source differs by one comment: the build
    # made from the original must be ignored there, and the JIT takes over.
    shutil.copytree(ROOT / "analysis", tmp_path / "analysis", ignore=shutil.ignore_patterns("__pycache__"))
    probe = [sys.executable, "-c", "from analysis import compiled; print(compiled.MODE)"]
    env = {k: v for k, v in os.environ.items() if k != compiled.ENV_MODE}
    env["PYTHONPATH"] = str(tmp_path)
    same = subprocess.run(probe, cwd=tmp_path, env=env, capture_output=True, text=True, timeout=60)
    # the signatures exported, in another order: a call would run the variant built for
    # another dtype (it segfaulted), so the build must not be used either
    bk = tmp_path / "analysis" / "build_kernels.py"
    text = bk.read_text()
    swapped = text.replace('"check_chunk": [("i8", (I8_1, F1)), ("i8", (I1, F1))',
                           '"check_chunk": [("i8", (I1, F1)), ("i8", (I8_1, F1))')
    assert swapped != text
    bk.write_text(swapped)
    reordered = subprocess.run(probe, cwd=tmp_path, env=env, capture_output=True, text=True, timeout=60)
    bk.write_text(text)
    with open(tmp_path / "analysis" / "signal_kernels.py", "a") as f:
        f.write("# edited\n")
    edited = subprocess.run(probe, cwd=tmp_path, env=env, capture_output=True, text=True, timeout=60)
    assert (same.stdout.strip(), reordered.stdout.strip(), edited.stdout.strip()) == ("aot", "jit", "jit")


def test_every_export_is_a_kernel_with_as_many_arguments():
    # build_kernels.EXPORTS must name the kernels the counter calls, one spec per argument
    import inspect

    from analysis import build_kernels, crossing_kernels, signal_kernels
    for name, sigs in build_kernels.EXPORTS.items():
        fn = getattr(signal_kernels, name, None) or getattr(crossing_kernels, name)
        n_args = len(inspect.signature(fn.py_func).parameters)
        assert all(len(args) == n_args for _, args in sigs), name
        assert all(build_kernels.numba_type(a) for _, args in sigs for a in args)


def test_version_says_how_the_kernels_are_compiled():
    env = {k: v for k, v in os.environ.items() if k != compiled.ENV_MODE}
    env["PYTHONPATH"] = str(ROOT)
    here = subprocess.run([sys.executable, "-m", "daq", "--version"], cwd=ROOT, env=env,
                          capture_output=True, text=True, timeout=60)
    forced = subprocess.run([sys.executable, "-m", "daq", "--version"], cwd=ROOT,
                            env={**env, compiled.ENV_MODE: "jit"}, capture_output=True, text=True, timeout=60)
    assert here.returncode == forced.returncode == 0
    expected = "compiled ahead of time" if compiled.MODE == "aot" else "compiled by numba at first use"
    assert here.stdout.startswith("modetick ") and expected in here.stdout
    assert "at first use: MODETICK_KERNELS=jit" in forced.stdout

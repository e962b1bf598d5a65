"""Compile the counter's kernels ahead of time into analysis._kernels_aot.

    python -m analysis.build_kernels        # rebuild beside the sources (after editing a kernel)

setup.py runs this when modetick is installed. It uses numba's ahead-of-time
compiler (numba.pycc, which numba marks as pending deprecation; if it goes,
the counter keeps working through numba's JIT, see analysis/compiled.py) and
the machine's C compiler, for the baseline processor of the architecture (TARGET_CPU).

EXPORTS lists, for each kernel called from Python, the signatures built:
``(result, argument specs)``. An argument spec is a scalar ("f8", "i8", "b1")
or an array "<dtype>:<ndim><layout>" with layout C (row-major contiguous),
F (column-major contiguous) or A (any strides). The counter hands the
kernels exactly these types; analysis/compiled.py checks every call.
"""
from __future__ import annotations

import argparse
import os
import sys
import sysconfig
import tempfile
from pathlib import Path

MODULE = "_kernels_aot"

F1, I1, B1, I8_1 = "float64:1C", "int64:1C", "bool:1C", "int8:1C"
EXPORTS: dict[str, list[tuple[str, tuple[str, ...]]]] = {
    # signal_kernels
    "check_chunk": [("i8", (I8_1, F1)), ("i8", (I1, F1)), ("i8", (F1, F1))],
    "despiked_block_means": [("void", (F1, F1))],
    "scan_batch": [("Tuple((i8, i8, b1))",
                    (F1, "i8", F1, F1, "f8", "f8", "f8", "f8", "i8", "f8", "f8", "f8", "b1", F1, "i8", "b1",
                     I1, I1, I1, F1))],
    "measure_runs": [("i8", (F1, F1, F1, "i8", "i8", "b1", I1, I1, B1, B1, B1, F1, "float64:2C",
                             "int64:2C", I1))],
    "grey_opening": [("void", (F1, "i8", F1))],
    # crossing_kernels
    "merge_and_number": [("Tuple((i8, i8, i8))",
                          (F1, F1, F1, I1, I1, I1, B1, F1, F1, F1, I1, "i8", F1, I1, "f8", "f8", "f8", "f8",
                           "f8", "f8", "f8", "f8", "f8", "int64:2F", "float64:2F", F1, I1))],
    "table_add": [("void", ("i8", F1, F1, F1, F1, "float64:2C", "float64:2C", "float64:2C", I1, I1, F1, F1,
                            F1, B1))],
    "backlash_pairs": [("i8", (I1, F1, I1, I1, F1, I1, F1))],
}

_NB_DTYPE = {"float64": "f8", "int64": "i8", "int8": "i1", "bool": "b1"}


def numba_type(spec: str) -> str:
    """An argument spec as a numba type string: "float64:2F" -> "f8[::1, :]"."""
    if spec in ("f8", "i8", "b1"):       # scalars are spelt as numba spells them
        return spec
    dtype, shape = spec.split(":")
    ndim, layout = int(shape[:-1]), shape[-1]
    dims = [":"] * ndim
    if layout == "C":
        dims[-1] = "::1"
    elif layout == "F":
        dims[0] = "::1"
    return f"{_NB_DTYPE[dtype]}[{', '.join(dims)}]"


def default_target() -> Path:
    """Where the extension module goes beside the sources (the name Python imports)."""
    return Path(__file__).resolve().parent / (MODULE + sysconfig.get_config_var("EXT_SUFFIX"))


# The processor the code is compiled for: "" is the baseline of the architecture (x86-64:
# SSE2), so a build that travels (a wheel cache, a container, a venv shared over the network)
# runs on any machine of that kind. "host" was no faster on the benchmark traces.
TARGET_CPU = ""


def build(target: Path | None = None, verbose: bool = False, cpu: str = TARGET_CPU) -> Path:
    """Compile every export into the extension module ``target``; returns its path."""
    os.environ["MODETICK_KERNELS"] = "jit"     # the kernel modules as numba functions
    root = str(Path(__file__).resolve().parents[1])
    if root not in sys.path:
        sys.path.insert(0, root)
    from numba.pycc import CC

    from analysis import compiled, crossing_kernels, signal_kernels
    if compiled.AOT is not None:
        raise RuntimeError("build_kernels: the kernels were already loaded from an ahead-of-time build; "
                           "run it in a process of its own")
    cc = CC(MODULE, source_module=signal_kernels)
    cc.verbose = verbose
    cc.target_cpu = cpu
    for name, sigs in EXPORTS.items():
        fn = getattr(signal_kernels, name, None) or getattr(crossing_kernels, name)
        for i, (result, args) in enumerate(sigs):
            cc.export(f"{name}__{i}", f"{result}({', '.join(numba_type(a) for a in args)})")(fn.py_func)
    stamp = compiled.source_stamp()

    def source_stamp():
        return stamp
    cc.export("source_stamp", "i8()")(source_stamp)
    target = Path(target) if target is not None else default_target()
    target.parent.mkdir(parents=True, exist_ok=True)
    # built aside, then moved into place in one step: a process still using the
    # old module keeps its (unlinked) file
    with tempfile.TemporaryDirectory(dir=target.parent) as tmp:
        cc.output_dir = tmp
        cc.output_file = target.name
        cc.compile()
        os.replace(Path(tmp) / target.name, target)
    return target


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--target", type=Path, default=None,
                    help="path of the extension module (default: beside the sources)")
    ap.add_argument("-v", "--verbose", action="store_true")
    args = ap.parse_args(argv)
    path = build(args.target, args.verbose)
    print(f"modetick: counter kernels compiled ahead of time into {path}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

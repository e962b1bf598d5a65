"""Which machine code runs the counter's loops.

The loops in signal_kernels.py and crossing_kernels.py are compiled with
numba. Installing modetick also compiles them ahead of time into the
extension module ``analysis._kernels_aot`` (analysis/build_kernels.py, run by
setup.py). When that module is there and was built from the kernel sources
and signatures as they are now, the kernels come from it and numba is never imported: a
command that counts then starts in a tenth of a second instead of half a
second or more (numba's import and its first call). Otherwise, or with
MODETICK_KERNELS=jit in the environment, numba compiles them on first use
and caches the machine code (``__pycache__``) as before: the same Python
source, the same results (tests/test_compiled_kernels.py holds the two
against each other).

Ahead-of-time functions take their arguments' types on trust (a wrong dtype
would be read as raw memory), so each is wrapped in a check of every argument
against the signatures it was built for; a mismatch raises TypeError.
"""
from __future__ import annotations

import hashlib
import os
from pathlib import Path
from typing import Callable

import numpy as np

HERE = Path(__file__).resolve().parent
KERNEL_SOURCES = ("signal_kernels.py", "crossing_kernels.py", "counter_settings.py")
ENV_MODE = "MODETICK_KERNELS"   # "jit" forces numba's JIT


def source_stamp() -> int:
    """A 60-bit digest of the kernel sources and of the signatures exported
    (build_kernels.EXPORTS): an ahead-of-time build is used only for these."""
    from analysis.build_kernels import EXPORTS
    h = hashlib.sha256()
    for name in KERNEL_SOURCES:
        h.update((HERE / name).read_bytes())
    h.update(repr(sorted(EXPORTS.items())).encode())
    return int(h.hexdigest()[:15], 16)


def _load_aot():
    """(the ahead-of-time module or None, why not)."""
    from analysis.build_kernels import EXPORTS
    if os.environ.get(ENV_MODE, "").lower() == "jit":
        return None, f"{ENV_MODE}=jit"
    try:
        from analysis import _kernels_aot as mod
    except ImportError:
        return None, "no ahead-of-time build (python -m analysis.build_kernels makes one)"
    try:
        stamp = source_stamp()
    except OSError as exc:                 # sources not installed beside the build
        return None, f"kernel sources not readable ({exc})"
    try:
        if mod.source_stamp() != stamp:
            return None, ("the ahead-of-time build is of other kernel sources "
                          "(rebuild: python -m analysis.build_kernels)")
    except AttributeError:
        return None, "not a modetick kernel build"
    missing = [f"{n}__{i}" for n, sigs in EXPORTS.items() for i in range(len(sigs))
               if not hasattr(mod, f"{n}__{i}")]
    if missing:
        return None, f"the ahead-of-time build lacks {', '.join(missing)}"
    return mod, ""


AOT, WHY_JIT = _load_aot()
MODE = "aot" if AOT is not None else "jit"

# --- argument checks for the ahead-of-time functions ------------------------------

_DTYPES = {"float64": np.float64, "int64": np.int64, "int8": np.int8, "bool": np.bool_}
_SCALARS = {"f8": (float, int, np.floating, np.integer), "i8": (int, np.integer),
            "b1": (bool, np.bool_)}


def parse_arg(spec: str):
    """One argument of a signature as built (build_kernels.EXPORTS): "f8", "i8", "b1"
    or "<dtype>:<ndim><layout>", layout C or F (contiguous that way) or A (any)."""
    if spec in _SCALARS:
        return spec
    dtype, shape = spec.split(":")
    return (np.dtype(_DTYPES[dtype]), int(shape[:-1]), shape[-1])


def matcher(specs: tuple) -> Callable[..., bool]:
    """A function of the arguments that says whether they match ``specs`` (parse_arg's).

    Written out as one expression and compiled with exec (as the standard
    library's dataclasses and namedtuple make their methods): a loop over the
    arguments cost twice as much per call, and the counter makes tens of
    thousands of calls a second.
    """
    env: dict = {"ndarray": np.ndarray, "BOOL": _SCALARS["b1"], "INT": _SCALARS["i8"], "REAL": _SCALARS["f8"]}
    names = [f"a{i}" for i in range(len(specs))]
    conds = []
    for a, spec in zip(names, specs):
        if type(spec) is str:
            kind = {"b1": "BOOL", "i8": "INT", "f8": "REAL"}[spec]
            conds.append(f"isinstance({a}, {kind})" if spec == "b1"
                         else f"(isinstance({a}, {kind}) and not isinstance({a}, BOOL))")
            continue
        dtype, ndim, layout = spec
        env[f"D_{a}"] = dtype
        c = f"(type({a}) is ndarray and ({a}.dtype is D_{a} or {a}.dtype == D_{a}) and {a}.ndim == {ndim}"
        if layout != "A":
            c += f" and {a}.flags.{'c' if layout == 'C' else 'f'}_contiguous"
        conds.append(c + ")")
    src = f"def match(*args):\n    if len(args) != {len(specs)}:\n        return False\n" \
          f"    {', '.join(names)}{',' if len(names) == 1 else ''} = args\n" \
          f"    return {' and '.join(conds) or 'True'}\n"
    exec(src, env)
    return env["match"]


def checked(name: str, variants: list[tuple[tuple, Callable]]) -> Callable:
    """The ahead-of-time function(s) for one kernel, behind an argument check.

    ``variants``: (argument specs, compiled function) per signature built; the
    first whose specs the arguments match runs.
    """
    if len(variants) == 1:
        (specs, fn), = variants
        match = matcher(specs)

        def one(*args):
            if not match(*args):
                raise TypeError(f"{name}: arguments {_describe(args)} do not match {specs}")
            return fn(*args)
        one.__name__ = name
        return one

    tried = [(matcher(specs), fn) for specs, fn in variants]

    def several(*args):
        for match, fn in tried:
            if match(*args):
                return fn(*args)
        raise TypeError(f"{name}: arguments {_describe(args)} match none of "
                        f"{[s for s, _ in variants]}")
    several.__name__ = name
    return several


def _describe(args: tuple) -> list[str]:
    return [f"{a.dtype}:{a.ndim}" if isinstance(a, np.ndarray) else type(a).__name__ for a in args]


def kernel(**options):
    """numba.njit(**options), or the ahead-of-time build of the function of the same name.

    Helpers that only other kernels call are not exported: with the build
    loaded they stay plain Python functions, never called.
    """
    if AOT is None:
        from numba import njit
        return njit(**options)

    def pick(fn):
        from analysis.build_kernels import EXPORTS
        if fn.__name__ not in EXPORTS:
            return fn
        variants = [(tuple(parse_arg(a) for a in specs), getattr(AOT, f"{fn.__name__}__{i}"))
                    for i, (_, specs) in enumerate(EXPORTS[fn.__name__])]
        run = checked(fn.__name__, variants)
        run.py_func = fn            # as numba's functions have it
        return run
    return pick

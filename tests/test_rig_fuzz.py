"""Fuzzing the rig loader: any input gives a Rig or a one-line RigError, nothing else."""
import json

from hypothesis import given, settings, strategies as st

from daq.rig import CORE_SCHEMA, Rig, RigError, parse_rig

SECTION = st.sampled_from(list(CORE_SCHEMA) + ["stgae", "extra"])
KEY = st.sampled_from(["start", "stop", "step", "passes", "settle_s", "driver", "mode", "order",
                       "lines_per_mm", "group_index", "deg_per_step", "min_steps", "max_steps",
                       "scenario", "seed", "reads_per_step", "bogus", "speed_steps_per_s"])
VALUE = st.one_of(st.integers(-10**6, 10**6), st.floats(allow_nan=True, allow_infinity=True),
                  st.text(max_size=8), st.booleans(), st.lists(st.integers(), max_size=3))


def _toml_value(v):
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, float):
        if v != v:
            return "nan"
        if v in (float("inf"), float("-inf")):
            return "inf" if v > 0 else "-inf"
        return repr(v)
    if isinstance(v, str):
        return json.dumps(v)
    if isinstance(v, list):
        return "[" + ", ".join(str(x) for x in v) + "]"
    return str(v)


def _check(text, overrides=()):
    try:
        rig = parse_rig(text, "fuzz.toml", list(overrides))
    except RigError as exc:
        assert "\n" not in str(exc) and str(exc).startswith("rig file fuzz.toml")
        return
    assert isinstance(rig, Rig)
    assert rig["sweep"]["step"] > 0


@settings(max_examples=300, deadline=None)
@given(st.dictionaries(SECTION, st.dictionaries(KEY, VALUE, max_size=6), max_size=6))
def test_structured_rigs(tables):
    base = {"sweep": {"start": 0, "stop": 100, "step": 1}}
    for name, table in tables.items():
        base.setdefault(name, {}).update(table)
    text = "".join(f"[{name}]\n" + "".join(f"{k} = {_toml_value(v)}\n" for k, v in t.items())
                   for name, t in base.items())
    _check(text)


@settings(max_examples=300, deadline=None)
@given(st.text(max_size=200))
def test_arbitrary_text(text):
    _check(text)


@settings(max_examples=200, deadline=None)
@given(st.lists(st.text(max_size=30), max_size=4))
def test_arbitrary_overrides(overrides):
    _check("[sweep]\nstart = 0\nstop = 100\nstep = 1\n", overrides)

"""Rig files: TOML descriptions of one bench, validated before anything moves.

A schema is a dict ``key -> default``; the key's type is the default's type
(an int default also accepts nothing but ints, a float default accepts ints).
Where the default cannot say the type, the entry is a tuple ``(type, default)``
with ``default`` ``REQUIRED`` (must be given) or ``None`` (optional, no
default). Sections ``[counter]`` and ``[sim]`` take their schemas from the
packages that use them, ``[stage]``/``[detector]`` add the keys of the chosen
driver, so a key is valid exactly when some code reads it.
"""
from __future__ import annotations

import copy
import difflib
import json
import math
import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from drivers.aux_channels import AUX_SCHEMA

REQUIRED = ...

CORE_SCHEMA: dict[str, dict[str, Any]] = {
    "stage": {
        "driver": "sim",
        # Calibration: grating angle = angle_at_zero_deg + deg_per_step * steps.
        "deg_per_step": (float, None),
        "deg_per_step_u": 0.0,
        "angle_at_zero_deg": (float, None),
        "angle_at_zero_deg_u": 0.0,
        # The direction the stage moved when that calibration was taken ("up": increasing
        # steps): with backlash, the angle at a reading depends on the way the stage came.
        "calibrated_moving": "up",
        # Soft limits, checked before any move is sent.
        "min_steps": (int, None),
        "max_steps": (int, None),
    },
    "detector": {
        "driver": "sim",
        "reads_per_step": 1,
    },
    "sweep": {
        "start": (int, REQUIRED),
        "stop": (int, REQUIRED),
        "step": (int, REQUIRED),
        "passes": 1,
        "settle_s": 0.0,
        "mode": "step",
        "speed_steps_per_s": (float, None),
        # Extra travel past a reversal point before turning back, so the next
        # pass starts with the backlash taken up (common practice).
        "overshoot_steps": 0,
        "dwell_s": 0.0,
    },
    "grating": {
        "lines_per_mm": (float, None),
        "lines_per_mm_u": 0.0,
        "order": 1,
    },
    "chip": {
        "group_index": (float, None),
        "group_index_u": 0.0,
    },
    "counter": {},
    "sim": {},
    # Auxiliary readbacks (temperature, drive current) logged with each sample.
    "aux": AUX_SCHEMA,
}


class RigError(ValueError):
    """A rig file that cannot be used; str() is one line for the user."""

    def __init__(self, source: str, key: str | None, message: str):
        self.source, self.key, self.message = source, key, message
        where = f"{key}: " if key else ""
        super().__init__(f"rig file {source}: {where}{message}")


@dataclass
class Rig:
    """A validated rig: ``sections[name][key]`` with every default filled in."""

    source: str
    text: str
    sections: dict[str, dict[str, Any]]
    overrides: list[str] = field(default_factory=list)

    def __getitem__(self, section: str) -> dict[str, Any]:
        return self.sections[section]

    def to_json(self) -> str:
        return json.dumps({"source": self.source, "overrides": self.overrides,
                           "sections": self.sections}, sort_keys=True)

    def calibrated(self) -> bool:
        from analysis.physics import Calibration
        return Calibration.from_sections(self.sections) is not None


def default_rig_path() -> Path:
    """configs/sim.toml of this checkout (or of the installed package), whatever the working directory."""
    return Path(__file__).resolve().parent.parent / "configs" / "sim.toml"


def _schema_for(section: str, data: dict[str, Any]) -> dict[str, Any]:
    schema = dict(CORE_SCHEMA[section])
    if section == "counter":
        from analysis.counter_settings import SETTINGS
        schema.update(SETTINGS)
    elif section == "sim":
        from sims.scenarios import SIM_SETTINGS
        schema.update(SIM_SETTINGS)
    elif section in ("stage", "detector"):
        from drivers.registry import driver_schema
        schema.update(driver_schema(section, str(data.get("driver", schema["driver"]))))
    return schema


def _spec(entry: Any) -> tuple[type, Any]:
    if isinstance(entry, tuple):
        return entry
    return type(entry), entry


def _check_type(kind: type, value: Any) -> Any | None:
    """Return the value coerced to kind, or None if it does not fit."""
    if kind is float:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            return None
        value = float(value)
        return value if math.isfinite(value) else None
    if kind is int:
        return value if isinstance(value, int) and not isinstance(value, bool) else None
    if kind is list:
        return value if isinstance(value, list) else None
    return value if isinstance(value, kind) else None


_TYPE_WORDS = {float: "a number", int: "an integer", str: "a string", bool: "true or false",
               list: "a list"}


def _parse_override(item: str, source: str) -> tuple[str, str, Any]:
    if "=" not in item or "." not in item.split("=", 1)[0]:
        raise RigError(source, None, f"--set {item!r}: expected SECTION.KEY=VALUE")
    lhs, raw = item.split("=", 1)
    section, key = lhs.strip().split(".", 1)
    try:
        value = tomllib.loads(f"v = {raw.strip()}")["v"]
    except tomllib.TOMLDecodeError:
        value = raw.strip()  # bare words are strings: --set stage.port=/dev/ttyUSB0
    return section, key, value


def _validate_values(source: str, s: dict[str, dict[str, Any]]) -> None:
    """Checks that span keys: impossible values the types alone let through."""
    sw, st = s["sweep"], s["stage"]
    if sw["step"] <= 0:
        raise RigError(source, "[sweep] step", f"must be a positive number of steps, got {sw['step']}")
    if sw["start"] == sw["stop"]:
        raise RigError(source, "[sweep] stop", "equals start: nothing to sweep")
    if sw["passes"] < 1:
        raise RigError(source, "[sweep] passes", f"must be at least 1, got {sw['passes']}")
    for key in ("settle_s", "dwell_s"):
        if sw[key] < 0:
            raise RigError(source, f"[sweep] {key}", f"must not be negative, got {sw[key]}")
    if sw["overshoot_steps"] < 0:
        raise RigError(source, "[sweep] overshoot_steps", "must not be negative")
    if sw["mode"] not in ("step", "scan"):
        raise RigError(source, "[sweep] mode", f"must be \"step\" or \"scan\", got {sw['mode']!r}")
    if sw["mode"] == "scan" and not sw["speed_steps_per_s"]:
        raise RigError(source, "[sweep] speed_steps_per_s", "is required when mode = \"scan\"")
    if sw["speed_steps_per_s"] is not None and sw["speed_steps_per_s"] <= 0:
        raise RigError(source, "[sweep] speed_steps_per_s", "must be positive")
    lo, hi = st["min_steps"], st["max_steps"]
    if lo is not None and hi is not None and lo >= hi:
        raise RigError(source, "[stage] min_steps", f"must be below max_steps ({lo} >= {hi})")
    over = sw["overshoot_steps"]
    ends = (min(sw["start"], sw["stop"]) - over, max(sw["start"], sw["stop"]) + over)
    if lo is not None and ends[0] < lo:
        raise RigError(source, "[sweep] start", f"sweep reaches {ends[0]} steps, below [stage] min_steps = {lo}")
    if hi is not None and ends[1] > hi:
        raise RigError(source, "[sweep] stop", f"sweep reaches {ends[1]} steps, beyond [stage] max_steps = {hi}")
    if s["detector"]["reads_per_step"] < 1:
        raise RigError(source, "[detector] reads_per_step", "must be at least 1")
    g, c = s["grating"], s["chip"]
    if g["lines_per_mm"] is not None and g["lines_per_mm"] <= 0:
        raise RigError(source, "[grating] lines_per_mm", "must be positive")
    if g["order"] == 0:
        raise RigError(source, "[grating] order", "must not be 0 (zeroth order does not disperse)")
    if c["group_index"] is not None and c["group_index"] < 1:
        raise RigError(source, "[chip] group_index", f"must be at least 1, got {c['group_index']}")
    for sec, key in (("stage", "deg_per_step_u"), ("stage", "angle_at_zero_deg_u"),
                     ("grating", "lines_per_mm_u"), ("chip", "group_index_u")):
        if s[sec][key] < 0:
            raise RigError(source, f"[{sec}] {key}", "an uncertainty must not be negative")
    if st["calibrated_moving"] not in ("up", "down"):
        raise RigError(source, "[stage] calibrated_moving", f"must be \"up\" or \"down\", got {st['calibrated_moving']!r}")
    if st["deg_per_step"] is not None and st["deg_per_step"] == 0:
        raise RigError(source, "[stage] deg_per_step", "must not be 0")
    # Per-package checks (e.g. counter thresholds) where a package offers them.
    from analysis.counter_settings import validate_settings
    for key, msg in validate_settings(s["counter"]):
        raise RigError(source, f"[counter] {key}", msg)
    from sims.scenarios import validate_sim_settings
    for key, msg in validate_sim_settings(s["sim"]):
        raise RigError(source, f"[sim] {key}", msg)
    # Driver settings (regular expressions, templates, ROI...): checked here so a
    # bad one is a rig-file error before any port is opened.
    from drivers.registry import check_settings
    for key, msg in check_settings(s):
        raise RigError(source, key, msg)


def parse_rig(text: str, source: str = "<string>", overrides: list[str] | None = None) -> Rig:
    """Validate rig-file text (plus ``SECTION.KEY=VALUE`` overrides) into a Rig."""
    overrides = list(overrides or [])
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise RigError(source, None, f"TOML syntax error: {exc}") from None
    raw = copy.deepcopy(raw)
    given = {}      # (section, key) -> the --set item that gave it, for the error message

    def said(name: str, key: str | None = None) -> str:
        item = given.get((name, key)) or (given.get((name, None)) if key is None else None)
        return f" (given by --set {item})" if item else ""
    for item in overrides:
        section, key, value = _parse_override(item, source)
        given[(section, key)] = given[(section, None)] = item
        raw.setdefault(section, {})
        if not isinstance(raw[section], dict):
            raise RigError(source, f"[{section}]", "is not a table")
        raw[section][key] = value

    for name, table in raw.items():
        if name not in CORE_SCHEMA:
            near = difflib.get_close_matches(name, CORE_SCHEMA, n=1)
            hint = f" (did you mean [{near[0]}]?)" if near else ""
            raise RigError(source, f"[{name}]", f"unknown section{hint}{said(name)}")
        if not isinstance(table, dict):
            raise RigError(source, f"[{name}]", "must be a table of keys")

    sections: dict[str, dict[str, Any]] = {}
    for name in CORE_SCHEMA:
        data = raw.get(name, {})
        try:
            schema = _schema_for(name, data)
        except KeyError as exc:  # unknown driver name
            raise RigError(source, f"[{name}] driver", str(exc.args[0])) from None
        out: dict[str, Any] = {}
        for key, value in data.items():
            if key not in schema:
                near = difflib.get_close_matches(key, schema, n=1)
                hint = f" (did you mean {near[0]!r}?)" if near else ""
                raise RigError(source, f"[{name}] {key}", f"unknown key{hint}{said(name, key)}")
            kind, _ = _spec(schema[key])
            coerced = _check_type(kind, value)
            if coerced is None:
                raise RigError(source, f"[{name}] {key}",
                               f"must be {_TYPE_WORDS.get(kind, kind.__name__)}, got {value!r}{said(name, key)}")
            out[key] = coerced
        for key, entry in schema.items():
            if key in out:
                continue
            _, default = _spec(entry)
            if default is REQUIRED:
                raise RigError(source, f"[{name}] {key}", "is required")
            out[key] = copy.deepcopy(default)
        sections[name] = out
    try:
        _validate_values(source, sections)
    except RigError as exc:
        m = re.fullmatch(r"\[(\w+)\] (\w+)", exc.key or "")
        if m and (m.group(1), m.group(2)) in given:
            raise RigError(source, exc.key, exc.message + said(m.group(1), m.group(2))) from None
        raise
    return Rig(source=source, text=text, sections=sections, overrides=overrides)


def load_rig(path: str | Path | None = None, overrides: list[str] | None = None) -> Rig:
    """Read and validate a rig file; the simulated rig when path is None."""
    p = Path(path) if path is not None else default_rig_path()
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise RigError(str(p), None, "no such file") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise RigError(str(p), None, f"cannot read it ({exc.__class__.__name__}: {exc})") from None
    return parse_rig(text, str(p), overrides)


# What a resumed run may change: where a device is plugged in, nothing about what it
# measures (a USB adapter often comes back under another name after a pulled cable).
CONNECTION_KEYS = ("port", "resource", "source")


def _is_device(source: str) -> bool:
    """A camera given as a device (an index or /dev/...), not a recorded video file."""
    return source.isdigit() or source.startswith("/dev/")


def reconnect(rig: Rig, items: list[str], source: str = "of the resumed run") -> Rig:
    """The rig with connection keys (CONNECTION_KEYS) changed by SECTION.KEY=VALUE items:
    only keys the run already used, and a camera only from one device to another (a
    recorded video in its place would change the data)."""
    sections = copy.deepcopy(rig.sections)
    have = [f"{sec}.{k}" for sec, t in sections.items() for k in CONNECTION_KEYS if t.get(k)]
    for item in items:
        section, key, value = _parse_override(item, source)
        old = sections.get(section, {}).get(key) if key in CONNECTION_KEYS else None
        if not old:
            raise RigError(source, f"--set {item}",
                           "a resumed run keeps the rig stored in its log; only where a device is "
                           f"connected may change ({', '.join(have) or 'and this rig has no connection to change'})")
        value = str(value) if isinstance(value, int) and not isinstance(value, bool) else value
        if not isinstance(value, str) or not value:
            raise RigError(source, f"--set {item}", "must be a device path, a port or a resource string")
        if key == "source" and not (_is_device(str(old)) and _is_device(value)):
            raise RigError(source, f"--set {item}",
                           "a camera may move to another device (an index or /dev/video...), not from or to a "
                           "video file: that would change the data")
        sections[section][key] = value
    return Rig(source=rig.source, text=rig.text, sections=sections, overrides=rig.overrides + list(items))


def rig_from_json(blob: str) -> Rig:
    """Rebuild a Rig stored in a run log (values as resolved at the time)."""
    data = json.loads(blob)
    return Rig(source=data["source"], text="", sections=data["sections"],
               overrides=data.get("overrides", []))

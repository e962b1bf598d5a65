"""Auxiliary readbacks (e.g. chip temperature, drive current) logged beside each sample.

The ``[aux]`` section names one VISA/SCPI instrument, usually the laser's
current or temperature controller, and a list of queries. By default the
instrument is only ever asked questions: every channel query must be a SCPI
query (ending in ``?``) and nothing else is sent but ``*IDN?`` and
``SYST:ERR?``. Setpoints are written only when ``allow_write = true`` and each
value lies inside the ``[min, max]`` given beside it; laser diodes die of
current and temperature overshoot, so the limits are checked before anything
is sent and the write happens once, at open, never during a sweep.

This module is imported by the rig loader for ``AUX_SCHEMA``; it loads no
VISA code until an instrument is opened.
"""
from __future__ import annotations

import re
from typing import Any

from drivers.base import DeviceError, Reading
from drivers.messages import raise_first
from drivers.replies import template_fields
from drivers.retry import RETRY_KEYS
from drivers.visa_link import VISA_KEYS

AUX_SCHEMA: dict[str, Any] = {
    **VISA_KEYS,
    "resource": (str, None),   # no resource: no auxiliary channels
    "channels": [],            # [{ name = "temp_C", query = "TEC:TEMP?" }, ...]
    "allow_write": False,      # the only switch that lets modetick write to this instrument
    "setpoints": [],           # [{ command = "TEC:TEMP {value}", value = 25.0, min = 20.0, max = 30.0,
                               #    readback = "TEC:TEMP?" }]  (readback optional)
    **RETRY_KEYS,
}

_NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")


def _number(x: Any) -> bool:
    return isinstance(x, (int, float)) and not isinstance(x, bool)


def check_aux_settings(cfg: dict) -> list[tuple[str, str]]:
    """Problems in an [aux] section, as (key, message) pairs."""
    out: list[tuple[str, str]] = []
    if cfg["resource"] is None:
        if cfg["channels"] or cfg["setpoints"]:
            out.append(("resource", "channels or setpoints are given but no resource to read them from"))
        return out
    names = set()
    for i, ch in enumerate(cfg["channels"]):
        where = f"channels[{i}]"
        if not isinstance(ch, dict) or set(ch) != {"name", "query"}:
            out.append((where, "must be a table { name = \"...\", query = \"...?\" }"))
            continue
        if not isinstance(ch["name"], str) or not _NAME.fullmatch(ch["name"]):
            out.append((where, f"name {ch['name']!r} must be a plain identifier with its unit, e.g. temp_C"))
        elif ch["name"] in names:
            out.append((where, f"name {ch['name']!r} is used twice"))
        names.add(ch.get("name"))
        if not isinstance(ch["query"], str) or not ch["query"].strip().endswith("?"):
            out.append((where, f"query {ch['query']!r} must be a SCPI query ending in '?' "
                               "(auxiliary channels are read-only)"))
    if cfg["setpoints"] and not cfg["allow_write"]:
        out.append(("setpoints", "given while allow_write = false; nothing will be written unless "
                                 "allow_write = true"))
    for i, sp in enumerate(cfg["setpoints"]):
        where = f"setpoints[{i}]"
        if not isinstance(sp, dict) or not {"command", "value", "min", "max"} <= set(sp) \
                or not set(sp) <= {"command", "value", "min", "max", "readback"}:
            out.append((where, "must be a table { command = \"... {value}\", value, min, max, readback (optional) }"))
            continue
        if not isinstance(sp["command"], str) or template_fields(sp["command"]) != {"value"}:
            out.append((where, "command must contain {value} (a format such as {value:.3f} is allowed)"))
        if not all(_number(sp[k]) for k in ("value", "min", "max")):
            out.append((where, "value, min and max must be numbers"))
        elif not sp["min"] <= sp["value"] <= sp["max"]:
            out.append((where, f"value {sp['value']} is outside its limits [{sp['min']}, {sp['max']}]; "
                               "nothing will be written"))
        if "readback" in sp and not (isinstance(sp["readback"], str) and sp["readback"].strip().endswith("?")):
            out.append((where, "readback must be a SCPI query ending in '?'"))
    return out


class AuxChannels:
    """Reads the configured queries from one instrument; writes only allowed setpoints."""

    def __init__(self, cfg: dict):
        from drivers.visa_link import VisaLink

        raise_first(check_aux_settings(cfg), "aux")
        self.cfg = cfg
        self.link = VisaLink(cfg, "aux")
        self.idn = self.link.idn

    def _number(self, query: str) -> float:
        return self.link.retrying(lambda: self.link.query_number(query))

    def read(self) -> dict[str, float]:
        return {ch["name"]: self._number(ch["query"]) for ch in self.cfg["channels"]}

    def apply_setpoints(self) -> list[str]:
        """Write the allowed setpoints (limits re-checked here); returns what was sent."""
        sent = []
        for sp in self.cfg["setpoints"]:
            if not self.cfg["allow_write"] or not sp["min"] <= sp["value"] <= sp["max"]:
                raise DeviceError(f"{self.link.where()}: setpoint {sp['command']!r} not allowed; nothing sent")
            cmd = sp["command"].format(value=sp["value"])
            self.link.write(cmd)
            sent.append(cmd)
            if "readback" in sp:
                got = self._number(sp["readback"])
                if not sp["min"] <= got <= sp["max"]:
                    raise DeviceError(f"{self.link.where()}: sent {cmd!r}, {sp['readback']!r} reads {got:g}, "
                                      f"outside [{sp['min']}, {sp['max']}]")
        return sent

    def close(self) -> None:
        self.link.close()


class WithAux:
    """A detector whose readings also carry the auxiliary channels in ``aux``."""

    def __init__(self, inner, aux: AuxChannels):
        self.inner, self.aux = inner, aux
        self.name = inner.name

    def identify(self) -> str:
        return f"{self.inner.identify()}; aux: {self.aux.idn}"

    def read(self) -> Reading:
        r = self.inner.read()
        r.aux.update(self.aux.read())
        return r

    def close(self) -> None:
        try:
            self.inner.close()
        finally:
            self.aux.close()

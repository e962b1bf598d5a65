"""A bench meter (DMM, power meter, DAQ) that speaks SCPI over any VISA resource.

At open the meter must answer ``*IDN?`` (IEEE 488.2) with a manufacturer,
model, serial and firmware field; after any failed reading the SCPI error
queue (``SYST:ERR?``) is read and quoted in the message. SCPI's overload
marker (9.9E37) stops the sweep with advice rather than entering the data as
a huge reading.
"""
from __future__ import annotations

import re
from typing import Any

from drivers.base import DeviceError, Reading
from drivers.messages import raise_first
from drivers.retry import RETRY_KEYS
from drivers.visa_link import VISA_KEYS, VisaLink

VISA_SCPI_KEYS: dict[str, Any] = {
    **VISA_KEYS,
    "query": "MEAS:VOLT:DC?",      # any query returning one number: READ?, FETC?, MEAS:POW?
    "value_reply": (str, None),    # regex with group value; default: the first comma-separated field
    "clear_at_open": True,         # send *CLS at open so SYST:ERR? reports only this run's errors
    **RETRY_KEYS,
}

# SCPI-99 (Syntax and Style), from memory: 9.9E37 stands for +infinity (overload),
# 9.91E37 for not-a-number.
SCPI_OVERLOAD = 9.9e37


def check_visa_scpi_settings(cfg: dict) -> list[tuple[str, str]]:
    if cfg["value_reply"] is None:
        return []
    try:
        if "value" not in re.compile(cfg["value_reply"]).groupindex:
            return [("value_reply", "needs a named group (?P<value>...)")]
    except re.error as exc:
        return [("value_reply", f"not a valid regular expression ({exc})")]
    return []


class VisaScpiDetector:
    def __init__(self, cfg: dict):
        raise_first(check_visa_scpi_settings(cfg), "detector")
        self.cfg = cfg
        self.value_rx = re.compile(cfg["value_reply"]) if cfg["value_reply"] else None
        self.link = VisaLink(cfg, "detector")
        self.name = f"visa-scpi meter {cfg['resource']}"
        if cfg["clear_at_open"]:
            try:
                self.link.write("*CLS")
            except BaseException:
                self.link.close()
                raise

    def identify(self) -> str:
        return self.link.idn

    def _read_once(self) -> Reading:
        q = self.cfg["query"]
        value = self.link.query_number(q, self.value_rx)
        if abs(value) >= SCPI_OVERLOAD:
            raise DeviceError(f"{self.link.where()}: sent {q!r}, got {value:g}: the meter reports overload; "
                              "set a fixed range that holds the brightest blip")
        return Reading(value)

    def read(self) -> Reading:
        return self.link.retrying(self._read_once)

    def close(self) -> None:
        self.link.close()

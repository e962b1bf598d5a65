"""Build stage and detector adapters from a rig's ``[stage]``/``[detector]`` sections.

Each driver registers the rig keys it reads (``key -> default``, see
``daq.rig`` for the format) and a factory. Adding a driver = one module with
a class implementing ``drivers.base.Stage`` or ``Detector`` plus one entry here.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable

from drivers.base import Detector, Stage


@dataclass(frozen=True)
class DriverEntry:
    keys: dict[str, Any]
    # factory(sections, bench) -> adapter; bench is the shared simulated
    # bench (or None) so simulated stage and detector see the same physics.
    factory: Callable[..., Any]


def _sim_stage(sections: dict, bench: Any) -> Stage:
    return bench.stage


def _sim_detector(sections: dict, bench: Any) -> Detector:
    return bench.detector


STAGE_DRIVERS: dict[str, DriverEntry] = {
    "sim": DriverEntry({}, _sim_stage),
}

DETECTOR_DRIVERS: dict[str, DriverEntry] = {
    "sim": DriverEntry({}, _sim_detector),
}


def _table(section: str) -> dict[str, DriverEntry]:
    return STAGE_DRIVERS if section == "stage" else DETECTOR_DRIVERS


def driver_schema(section: str, name: str) -> dict[str, Any]:
    table = _table(section)
    if name not in table:
        raise KeyError(f"unknown driver {name!r} (known: {', '.join(sorted(table))})")
    return table[name].keys


def needs_bench(sections: dict) -> bool:
    """True when any device of this rig is simulated (and needs the physics)."""
    return sections["stage"]["driver"].startswith("sim") or sections["detector"]["driver"].startswith("sim")


def open_devices(sections: dict) -> tuple[Stage, Detector, Any]:
    """Open the rig's stage and detector; returns (stage, detector, bench or None).

    If the detector fails to open, the stage is closed again before the error
    propagates, so nothing is left holding a port.
    """
    bench = None
    if needs_bench(sections):
        from sims.instruments import SimBench
        bench = SimBench(sections)
    stage = STAGE_DRIVERS[sections["stage"]["driver"]].factory(sections, bench)
    try:
        detector = DETECTOR_DRIVERS[sections["detector"]["driver"]].factory(sections, bench)
    except BaseException:
        stage.close()
        raise
    return stage, detector, bench

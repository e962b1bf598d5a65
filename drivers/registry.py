"""Build stage and detector adapters from a rig's ``[stage]``/``[detector]`` sections.

Each driver registers the rig keys it reads (``key -> default``, see
``daq.rig`` for the format; a default of ``...`` means required), a check of
the values the types alone let through, and a factory. Adding a driver = one
module with a class implementing ``drivers.base.Stage`` or ``Detector`` plus
one entry here. VISA and OpenCV are imported only when a device is opened, so
validating a rig file stays quick.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable

from drivers import camera, gcode, serial_ascii, visa_scpi
from drivers.base import DeviceError, Detector, Stage


@dataclass(frozen=True)
class DriverEntry:
    keys: dict[str, Any]
    # factory(sections, bench) -> adapter; bench is the shared simulated
    # bench (or None) so simulated stage and detector see the same physics.
    factory: Callable[..., Any]
    # check(section dict) -> [(key, message)]: values the types alone let through.
    check: Callable[[dict], list[tuple[str, str]]] | None = None


def _sim_stage(sections: dict, bench: Any) -> Stage:
    return bench.stage


def _sim_detector(sections: dict, bench: Any) -> Detector:
    return bench.detector


def _limited(cls):
    """Factory for a stage class taking (section, min_steps, max_steps)."""
    def factory(sections: dict, bench: Any) -> Stage:
        s = sections["stage"]
        return cls(s, s["min_steps"], s["max_steps"])
    return factory


def _plain(cls):
    """Factory for a detector class taking its section only."""
    return lambda sections, bench: cls(sections["detector"])


def _sim_camera(sections: dict, bench: Any) -> Detector:
    return camera.SimCameraDetector(sections["detector"], bench)


STAGE_DRIVERS: dict[str, DriverEntry] = {
    "sim": DriverEntry({}, _sim_stage),
    "serial-ascii": DriverEntry(serial_ascii.STAGE_KEYS, _limited(serial_ascii.SerialAsciiStage),
                                serial_ascii.check_stage_settings),
    "gcode": DriverEntry(gcode.GCODE_KEYS, _limited(gcode.GcodeStage), gcode.check_gcode_settings),
}

DETECTOR_DRIVERS: dict[str, DriverEntry] = {
    "sim": DriverEntry({}, _sim_detector),
    "visa-scpi": DriverEntry(visa_scpi.VISA_SCPI_KEYS, _plain(visa_scpi.VisaScpiDetector),
                             visa_scpi.check_visa_scpi_settings),
    "serial-ascii": DriverEntry(serial_ascii.DETECTOR_KEYS, _plain(serial_ascii.SerialAsciiDetector),
                                serial_ascii.check_detector_settings),
    "camera": DriverEntry(camera.CAMERA_KEYS, _plain(camera.CameraDetector), camera.check_reducer_settings),
    "sim-camera": DriverEntry(camera.REDUCER_KEYS, _sim_camera, camera.check_reducer_settings),
}


# Replay through the simulator: a logged sweep served back by mechanical position.
from sims import replay_detector as _replay  # noqa: E402

STAGE_DRIVERS["replay"] = DriverEntry(_replay.REPLAY_STAGE_KEYS, _replay.open_replay_stage)
DETECTOR_DRIVERS["replay"] = DriverEntry(_replay.REPLAY_DETECTOR_KEYS, _replay.open_replay_detector,
                                         _replay.check_replay_settings)


def _table(section: str) -> dict[str, DriverEntry]:
    return STAGE_DRIVERS if section == "stage" else DETECTOR_DRIVERS


def driver_schema(section: str, name: str) -> dict[str, Any]:
    table = _table(section)
    if name not in table:
        raise KeyError(f"unknown driver {name!r} (known: {', '.join(sorted(table))})")
    return table[name].keys


def check_settings(sections: dict) -> list[tuple[str, str]]:
    """Value problems in the device sections, as ("[section] key", message) pairs.

    Regular expressions that do not compile, templates without ``{steps}``,
    a malformed ``roi``, auxiliary writes without limits... A rig loader can
    report these as bad input before anything is opened.
    """
    out = []
    for section in ("stage", "detector"):
        entry = _table(section)[sections[section]["driver"]]
        if entry.check:
            out += [(f"[{section}] {k}", m) for k, m in entry.check(sections[section])]
    if sections.get("aux"):
        from drivers.aux_channels import check_aux_settings
        out += [(f"[aux] {k}", m) for k, m in check_aux_settings(sections["aux"])]
    return out


def needs_bench(sections: dict) -> bool:
    """True when any device of this rig is simulated (and needs the physics)."""
    return sections["stage"]["driver"].startswith("sim") or sections["detector"]["driver"].startswith("sim")


def open_devices(sections: dict, *, write_setpoints: bool = True) -> tuple[Stage, Detector, Any]:
    """Open the rig's stage and detector; returns (stage, detector, bench or None).

    The detector comes wrapped as the rig asks: averaged over
    ``[detector] reads_per_step`` (spread in ``Reading.spread``) and carrying
    the ``[aux]`` channels in ``Reading.aux``. Allowed ``[aux]`` setpoints are
    written here, once, unless ``write_setpoints`` is false (``modetick check``).
    If anything fails to open, what was opened is closed again before the
    error propagates, so nothing is left holding a port.
    """
    problems = check_settings(sections)
    if problems:
        key, msg = problems[0]
        raise DeviceError(f"{key}: {msg}")
    bench = None
    if needs_bench(sections):
        from sims.instruments import SimBench
        bench = SimBench(sections)
    stage = STAGE_DRIVERS[sections["stage"]["driver"]].factory(sections, bench)
    opened: list[Any] = [stage]
    try:
        detector = DETECTOR_DRIVERS[sections["detector"]["driver"]].factory(sections, bench)
        opened.append(detector)
        n = sections["detector"].get("reads_per_step", 1)
        # The simulated detector averages reads_per_step itself (it also flags
        # a clipped read among them), so it is not wrapped a second time.
        if n > 1 and sections["detector"]["driver"] != "sim":
            from drivers.averaging import AveragingDetector
            detector = AveragingDetector(detector, n)
        aux_cfg = sections.get("aux") or {}
        if aux_cfg.get("resource"):
            from drivers.aux_channels import AuxChannels, WithAux
            aux = AuxChannels(aux_cfg)
            opened.append(aux)
            if write_setpoints:
                aux.apply_setpoints()
            detector = WithAux(detector, aux)
    except BaseException:
        for device in reversed(opened):
            device.close()
        raise
    return stage, detector, bench

"""Instrument adapters: stages that turn the grating, detectors that read the laser.

Every adapter implements the small interfaces in ``drivers.base``; the sweep
engine (``daq``) sees nothing else. ``drivers.registry`` builds adapters from a
rig file's ``[stage]`` and ``[detector]`` sections (and ``[aux]``).

Stages: ``serial_ascii`` (any line protocol described in the rig file),
``gcode`` (one axis of a G-code controller); both on ``line_stage`` and
``serial_link`` (pyserial). Detectors: ``visa_scpi`` (SCPI over any VISA
resource, on ``visa_link``), ``serial_ascii``, ``camera`` (OpenCV, and the
simulated camera through the same frame processing). Wrappers:
``averaging`` (reads_per_step), ``aux_channels`` (read-only readbacks).
Faults: ``retry`` (bounded retries with backoff), ``messages`` (one-line
wording), ``replies`` (number parsing).
"""

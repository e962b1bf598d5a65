"""Instrument adapters: stages that turn the grating, detectors that read the laser.

Every adapter implements the small interfaces in ``drivers.base``; the sweep
engine (``daq``) sees nothing else. ``drivers.registry`` builds adapters from a
rig file's ``[stage]`` and ``[detector]`` sections.
"""

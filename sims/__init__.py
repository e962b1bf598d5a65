"""The simulated rig: physics of a grating-feedback diode laser, its mount and its detector.

``sims.instruments.SimBench`` puts a stage and a detector behind the
``drivers.base`` interfaces; ``sims.trace.simulate_trace`` computes a whole
sweep at once with the same physics; ``sims.truth`` says what a counter should
find. Nothing here imports ``analysis``: the simulator has physics of its own.
"""

"""Example rig files (TOML): installed beside the packages, so the simulated rig
(sim.toml) is the default for an installed modetick too."""

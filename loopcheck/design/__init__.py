"""Studies built on the engine: stability maps, the weak-grid sweep, tolerances, gain picking, firmware rounding, grid networks and passive damping."""

"""Time-domain proof: the sampled-data simulation, the switched model and scenarios."""

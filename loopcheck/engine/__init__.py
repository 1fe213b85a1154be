"""The mathematics: parameters with SI units, the LCL plant, its symbolic derivation, exact discretisation with delay and hold, controllers, the loop, verdict and margins."""

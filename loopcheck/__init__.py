"""loopcheck: stability, margins and design aids for the digitally sampled
current loop of a grid-connected inverter with an LCL filter.

Importing the package is cheap on purpose: nothing heavy (numpy, scipy,
control, matplotlib) is imported here, so ``loopcheck --help`` stays instant.
"""

__version__ = "0.1.0"

"""PWM sideband spectra and the harmonic current limits they are checked against."""

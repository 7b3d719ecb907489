"""spinflip: a 21 cm hydrogen-line spectrometer for small radio telescopes."""

__version__ = "0.1.0"

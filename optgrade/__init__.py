"""optgrade: inverse design of graded surface-resonator arrays for Rayleigh-wave control."""

__version__ = "0.1.0"

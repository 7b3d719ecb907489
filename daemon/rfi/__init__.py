"""Interference: impulse blanking, spectral kurtosis, persistent carriers, channels flagged by name."""

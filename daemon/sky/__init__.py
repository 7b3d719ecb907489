"""The sky side: the HI line and the radio velocity convention, coordinates and the LSRK correction, Galactic kinematics, spectral axes."""

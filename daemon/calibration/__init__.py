"""The kelvin scale: switched difference and folding, the Tsys meter, the noise source and its switches, hot/cold loads."""

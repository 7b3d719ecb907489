"""spinflip.daemon: acquisition, DSP, calibration, frames, archive and publishing."""

"""Where samples come from: the source interface, the simulator and its model galaxy, the dongle, replayed captures, the sample clock."""

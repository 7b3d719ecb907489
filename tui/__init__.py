"""spinflip.tui: the terminal UI (spinflip watch, spinflip demo), a pure subscriber of the daemon."""

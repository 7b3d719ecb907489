"""spinflip.tui: the terminal UI, a subscriber of the daemon (comes with its own issue)."""

"""The daemon itself: the main loop and its threads, systemd's notify protocol, the supervisor of its threads."""

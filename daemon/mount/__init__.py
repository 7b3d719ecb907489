"""Pointing drivers: a rotator behind rotctld, a hand-pointed dish, a fixed one (base.py);
the one for ``[pointing] driver`` from ``factory.make_mount``."""

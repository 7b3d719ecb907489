"""Pointing drivers: a rotator behind rotctld, a hand-pointed dish, a fixed one (base.py)."""

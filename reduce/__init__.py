"""Reduction of saved scans: stacks per target, the l-v diagram, the rotation curve by the
tangent-point method, kinematic distances and a face-on HI map (``spinflip reduce``).

It reads files; the daemon never imports it. matplotlib (Agg, headless) is imported only by
:mod:`spinflip.reduce.plots`.
"""

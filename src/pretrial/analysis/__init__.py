"""Judging a controller.

Sweep plans, the analyses (margins, Monte Carlo, worst case, sensitivity, map, linear loops,
integrator check), the verdict and its results file.
"""

"""Grounding a plant in bench logs.

Parameter estimates with bootstrap uncertainty, and a learned residual trusted only inside its
data envelope.
"""

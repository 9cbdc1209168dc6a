"""Rigging check for a festival lighting cable hung between two masts (invented data).

A uniform cable hangs as a catenary with parameter ``a`` (tension over weight per
metre). The crew measured the sag at midspan and the cable's length off the reel;
the loss says how far a candidate ``a`` and mast ``span`` are from both readings.
"""

import math

MEASURED_SAG = 1.85  # metres, at midspan
MEASURED_LENGTH = 40.6  # metres, off the reel
LENGTH_WEIGHT = 0.25


def rig_loss(a, span):
    half = span / (2.0 * a)
    sag, length = a * (math.cosh(half) - 1.0), 2.0 * a * math.sinh(half)
    sag_err = sag - MEASURED_SAG
    length_err = length - MEASURED_LENGTH
    loss = sag_err**2
    loss += LENGTH_WEIGHT * length_err**2
    return loss

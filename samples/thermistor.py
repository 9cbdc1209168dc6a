"""Calibration loss for a greenhouse soil-probe thermistor (invented bench data).

The probe's resistance-to-temperature law is a cubic in ln(R) (a Steinhart-Hart
style fit); the loss compares one bench reading against the reference thermometer.
"""

import math


def fit_loss(a, b, c, resistance, kelvin):
    ln_r = math.log(resistance)
    inv_t = a + b * ln_r + c * ln_r**3
    err = 1.0 / inv_t - kelvin
    return err * err

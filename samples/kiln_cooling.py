"""Fitting the cooling law of a pottery kiln to its overnight log (invented data).

The kiln loses heat by convection (rate ``k_conv``) and radiation (``k_rad``); a
small heater keeps the chamber from cooling below the glaze's safe point. The loss
compares the simulated temperature with thermocouple readings taken every
``steps_per_reading`` steps.
"""

AMBIENT = 293.15  # kelvin
SAFE_POINT = 700.0  # kelvin: below this the heater comes on
HEATER = 0.8  # kelvin per minute


def cooling_rate(temp, k_conv, k_rad):
    excess = temp - AMBIENT
    return k_conv * excess + k_rad * (temp**4 - AMBIENT**4) * 1e-9


def kiln_loss(k_conv, k_rad, start_temp, readings, dt, steps_per_reading):
    temp = start_temp
    loss = 0.0
    for reading in readings:
        for _ in range(steps_per_reading):
            heating = HEATER if temp < SAFE_POINT else 0.0
            temp = temp + dt * (heating - cooling_rate(temp, k_conv, k_rad))
        err = temp - reading
        loss += err * err
    return loss / len(readings)

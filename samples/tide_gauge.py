"""Fitting two tidal constituents to a harbour gauge's day of readings (invented data).

The water level is the station's datum plus a lunar and a solar semidiurnal wave,
each with its own amplitude and phase. The station's settings and the gauge log
are module-level data: the generated module copies them as written.
"""

import math
from collections import namedtuple

# datum: metres above chart datum; periods in hours (lunar and solar semidiurnal)
Station = namedtuple("Station", ["datum", "period_m2", "period_s2"])
HARBOUR = Station(2.1, 12.42, 12.0)

# (hour, height in metres) read off the gauge
READINGS = [
    (0.0, 3.02),
    (2.0, 2.71),
    (4.0, 1.64),
    (6.0, 1.12),
    (8.0, 1.58),
    (10.0, 2.66),
    (12.0, 3.08),
    (14.0, 2.69),
    (16.0, 1.71),
    (18.0, 1.20),  # night readings are noisier
    (20.0, 1.49),
    (22.0, 2.52),
]
WEIGHTS = {"day": 1.0, "night": 0.5}


def tide_misfit(amp_m2, phase_m2, amp_s2, phase_s2):
    total = 0.0
    for hour, height in READINGS:
        weight = WEIGHTS["night"] if hour >= 18.0 else WEIGHTS["day"]
        m2 = amp_m2 * math.cos(2.0 * math.pi * hour / HARBOUR.period_m2 - phase_m2)
        s2 = amp_s2 * math.cos(2.0 * math.pi * hour / HARBOUR.period_s2 - phase_s2)
        miss = HARBOUR.datum + m2 + s2 - height
        total += weight * miss * miss
    return total / len(READINGS)

"""Models with statements copied as written (lowering/inactive.py): guards, string
formatting, lookups in constant dicts, a while loop computing a constant."""

import math

RATES = {"slow": 0.5, "fast": 2.0}


def guarded(x, y):
    assert x > 0.0, f"x must be positive, got {x}"
    if y < -10.0:
        raise ValueError(f"y={y} is out of range")
    k = 1
    while k * k < 20:
        k += 1
    label = "k=" + str(k)
    gains = {"p": 1.5, "q": -0.25}
    z = x * y * k * gains["p"] + RATES["fast"] * math.log(x)
    for i in range(3):
        assert z == z, "z is not a number"
        note = label + ", step " + str(i)
        if note == "":
            raise ValueError(note)
        z = z * gains["q"] + math.sin(y * i)
    return z


def doubling(x, n):
    total = 0.0
    for i in range(n):
        m = 1
        while m < i:
            m *= 2
        total = total + m * x * x
    return total


def rebound(x):
    c = 3.0
    y = c * x
    while c < 10.0:
        c += 4.0
    return y * c

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


SPRINGS = [("a", "b", 40.0, 1.0), ("b", "c", 25.0, 1.5), ("c", "a", 30.0, 1.2)]
ANCHORS = {"a": 5.0, "c": 2.0}


def springs(xa, ya, xb, yb, xc, yc):
    """Energy of three nodes joined by springs, two of them tied to the origin;
    positions per node in dicts."""
    px = {"a": xa, "b": xb, "c": xc}
    py = {"a": ya, "b": yb, "c": yc}
    total = 0.0
    for i, j, k, rest in SPRINGS:
        dx = px[j] - px[i]
        dy = py[j] - py[i]
        stretch = math.sqrt(dx * dx + dy * dy) - rest
        total += 0.5 * k * stretch**2
    for name, k in ANCHORS.items():
        total += 0.5 * k * (px[name] ** 2 + py[name] ** 2)
    return total


def weighted(x):
    weights = {"low": 0.5, "high": 3.0}
    total = 0.0
    for name in weights:
        total = total + weights[name] * x
    for w in ANCHORS.values():
        total = total + w * x * x
    for name in ANCHORS.keys():
        total = total + ANCHORS[name] * math.sin(x)
    return total

"""Value of a depot's right to buy next month's fuel delivery at a fixed price.

The depot holds a European-style call on a fuel shipment (invented figures). Under the
lognormal price model its value is the Black-Scholes formula; the gradient gives the
sensitivities the treasurer watches (spot, volatility, rate, time).
"""

from math import erf, exp, log, sqrt

SQRT2 = 1.4142135623730951


def normal_cdf(x):
    return 0.5 * (1.0 + erf(x / SQRT2))


def call_value(spot, strike, vol, rate, years):
    root_t = sqrt(years)
    d1 = (log(spot / strike) + (rate + 0.5 * vol * vol) * years) / (vol * root_t)
    d2 = d1 - vol * root_t
    n1 = 0.5 * (1.0 + erf(d1 / SQRT2))
    n2 = 0.5 * (1.0 + erf(d2 / SQRT2))
    return spot * n1 - strike * exp(-rate * years) * n2

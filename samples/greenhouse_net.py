"""A small network that predicts greenhouse humidity from four sensor features.

Training loss for one batch of invented readings: a tanh hidden layer with a bias
broadcast over the batch, a linear read-out, the mean squared error against the
logged humidity, and a small weight penalty.
"""

import numpy as np

PENALTY = 1e-3


def humidity_loss(W1, b1, w2, b2, features, humidity):
    hidden = np.tanh(features @ W1 + b1)
    predicted = hidden @ w2 + b2
    err = predicted - humidity
    penalty = PENALTY * (np.sum(W1**2) + w2 @ w2)
    return np.mean(err**2) + penalty

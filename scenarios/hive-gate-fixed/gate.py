"""A gated layer with a hand-written backward pass, for Stepper's custom-layer interface.

Each unit j computes a value and a gate from the same input and lets the gate
scale the value:

    H = X @ W + b              value,  (n, units)
    G = sigmoid(X @ V + c)     gate in (0, 1), (n, units)
    out = H * G

Backward, given dOut = dCost/dout of shape (n, units):

    dH = dOut * G              the value reaches the output through the gate
    dS = dOut * H * G * (1 - G)   slope at the gate's input (sigmoid' = G (1 - G))
    dW = X^T dH,  db = sum_rows dH
    dV = X^T dS,  dc = sum_rows dS
    dX = dH W^T + dS V^T
"""

import numpy as np


def sigmoid(z):
    # 0.5 * (1 + tanh(z / 2)) is 1 / (1 + exp(-z)) without overflow for large |z|.
    return 0.5 * (1.0 + np.tanh(0.5 * z))


class GatedUnits:
    bias_keys = ("b", "c")

    def __init__(self, n_in, units, options):
        if units is None:
            raise ValueError("give units = N in the model file")
        self.n_in = n_in
        self.n_out = units
        # Gates start mostly open: sigmoid(1.0) is about 0.73.
        self.gate_shift = float(options.get("gate_shift", 1.0))

    def init(self, rng):
        scale = np.sqrt(1.0 / self.n_in)
        return {
            "W": rng.normal(0.0, scale, (self.n_in, self.n_out)),
            "b": np.zeros(self.n_out),
            "V": rng.normal(0.0, scale, (self.n_in, self.n_out)),
            "c": np.full(self.n_out, self.gate_shift),
        }

    def forward(self, params, X):
        H = X @ params["W"] + params["b"]
        G = sigmoid(X @ params["V"] + params["c"])
        return H * G, (X, H, G)

    def backward(self, params, cache, dOut):
        X, H, G = cache
        dH = dOut * G
        dS = dOut * H * G * (1.0 - G)
        slopes = {
            "W": X.T @ dH,
            "b": dH.sum(axis=0),
            "V": X.T @ dS,
            "c": dS.sum(axis=0),
        }
        dX = dH @ params["W"].T + dS @ params["V"].T
        return slopes, dX

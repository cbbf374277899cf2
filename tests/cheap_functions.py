"""Cheap activation functions written from their definitions, shared by the fitter tests.

Independent of swapper.functions.registry on purpose: the tests compare the package against these.
"""
import numpy as np


def relu(z):
    # source: ONNX operator spec, Relu: y = max(0, x)
    return np.maximum(z, 0.0)


def drelu(z):
    return (z > 0).astype(np.float64)


def hard_swish(z):
    # source: ONNX operator spec, HardSwish: y = x * max(0, min(1, x/6 + 1/2)) = x*clip(x+3,0,6)/6
    return z * np.clip(z + 3.0, 0.0, 6.0) / 6.0


def dhard_swish(z):
    return np.where(z < -3, 0.0, np.where(z > 3, 1.0, (2 * z + 3) / 6.0))

"""Carrying out a plan on a copy of the model: emit surrogates, fold parameters into layers."""

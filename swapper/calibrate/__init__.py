"""Fitting the plan's parameters on recorded tensors: the loop, bias correction, consumer refit."""

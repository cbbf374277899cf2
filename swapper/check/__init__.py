"""Judging a candidate against its original: comparison, statistics, gate, latency, size, int8."""

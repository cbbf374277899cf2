"""Outputs for people and scripts: report.json, report.html, terminal tables."""

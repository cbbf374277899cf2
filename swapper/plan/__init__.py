"""Deciding the swap: which sites, which surrogate, and where each parameter lives (placement)."""

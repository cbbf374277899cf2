"""`swapper bench`: accuracy recovered, the tool's own cost, memory and speed of swapped models."""

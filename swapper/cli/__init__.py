"""The `swapper` command line: typer commands (app.py) over the commands' work (run.py, demo.py).

``swapper.cli.app:app`` is the console entry point.
"""
from swapper.cli.app import app

__all__ = ["app"]

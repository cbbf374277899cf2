"""``python -m swapper.cli``: the same commands as the ``swapper`` script."""
from swapper.cli.app import app

app(prog_name="swapper")

"""Shared helpers for the end-to-end tests that drive the CLI on the demo models."""
import hashlib
from pathlib import Path

from typer.testing import CliRunner

from swapper.cli.app import app

DEMO = Path(__file__).resolve().parent.parent / "demo_models"
CALIB, VAL = DEMO / "calib.npz", DEMO / "val.npz"
runner = CliRunner()


def sha256(path: Path) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def invoke(*args):
    return runner.invoke(app, [str(a) for a in args])

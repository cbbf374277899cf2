"""Fixtures shared by every test folder, and where the shared test code lives.

Layout: tests/<subpackage>/ holds the tests of swapper/<subpackage>/ (core,
functions, fit, data, scan, plan, rewrite, calibrate, check, report, cli,
bench); tests/test_layering.py and tests/test_demo_models.py check the
package's shape and the committed demo models as a whole.

Shared code has two homes, one definition each:

- here, as fixtures, what a test asks for while it runs:
  ``cli`` runs the ``swapper`` command in-process, ``through_loader`` saves a
  model under the test's tmp_path and reads it back with swapper's own loader;
- tests/testkit.py, as plain functions and constants, whatever is needed at
  import time or inside model builders (parametrize lists, module constants):
  the demo paths, ONNX model builders, onnxruntime / reference runners,
  in-memory data sets, the activation functions written from their definitions.
  Use it from any subfolder with ``from testkit import DEMO, init, run``:
  ``pythonpath = ["tests"]`` in pyproject.toml puts tests/ on sys.path.

Test files keep unique basenames across the tree: pytest's default
("prepend") import mode imports each test file as a top-level module named
after its file.
"""
from __future__ import annotations

import onnx
import pytest
from testkit import fixed_timer
from typer.testing import CliRunner

from swapper.cli.app import app
from swapper.core.model_io import load_model


@pytest.fixture(scope="session", autouse=True)
def no_target_timing():
    """No test times a target: swap and check verify a candidate on a measured target through
    swapper.check.on_target.measure_latency, answered here by testkit.fixed_timer (candidate 0.9× the
    original), so what a command writes does not depend on the machine's load. Session-wide, so module
    fixtures that run commands see it too; tests of the timing patch it again with their own answer."""
    with pytest.MonkeyPatch.context() as patch:
        patch.setattr("swapper.check.on_target.measure_latency", fixed_timer(0.9))
        yield


@pytest.fixture(scope="session")
def cli():
    """``cli(*args)`` runs ``swapper *args`` in-process (typer's CliRunner; arguments str()-ed) and returns
    click's Result: exit_code, stdout, stderr, output."""
    runner = CliRunner()

    def invoke(*args):
        return runner.invoke(app, [str(a) for a in args])

    return invoke


@pytest.fixture
def through_loader(tmp_path):
    """``through_loader(model, name="m.onnx")``: ``model`` saved under tmp_path and read back by
    swapper.core.model_io.load_model (named nodes, inferred shapes), as the command line would see it."""

    def load(model: onnx.ModelProto, name: str = "m.onnx") -> onnx.ModelProto:
        path = tmp_path / name
        onnx.save(model, path)
        return load_model(path).model

    return load

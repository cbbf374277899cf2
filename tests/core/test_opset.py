"""Opset conversion: onnx's version converter, the full checker, and an output comparison in onnxruntime."""
from __future__ import annotations

import numpy as np
import onnx
import pytest
from onnx import numpy_helper
from testkit import DEMO, VAL, run

from swapper.core.model_io import load_model
from swapper.core.opset import ROUNDING, check_conversion, convert_opset
from swapper.errors import BadModelError, UsageError


@pytest.fixture(scope="module")
def resnet():
    return load_model(DEMO / "meter_resnet_silu.onnx").model  # opset 13 (demo_models/manifest.json)


def _batches():
    with np.load(VAL) as val:
        x = val["pixels"][:128]
    return [{"pixels": x[:64]}, {"pixels": x[64:]}]


def test_conversion_to_14_is_checked_and_changes_nothing(resnet):
    converted = convert_opset(resnet, 14)
    assert [o.version for o in converted.opset_import if o.domain in ("", "ai.onnx")] == [14]
    onnx.checker.check_model(converted, full_check=True)  # source: the ONNX checker
    assert all(n.name for n in converted.graph.node)
    record = check_conversion(resnet, converted, 14, _batches(), feeds_from="val")
    # source: onnxruntime runs both models on the same rows
    x = np.concatenate([b["pixels"] for b in _batches()])
    diff = np.max(np.abs(run(resnet, {"pixels": x})[0] - run(converted, {"pixels": x})[0]))
    assert record["from"] == 13 and record["to"] == 14 and record["samples"] == 128
    assert record["max_abs_diff"] == pytest.approx(float(diff), abs=1e-7) and record["max_abs_diff"] <= record["bound"]


def test_a_conversion_that_moves_the_outputs_is_refused(resnet):
    changed = convert_opset(resnet, 14)
    w = changed.graph.initializer[0]
    value = numpy_helper.to_array(w).copy()
    w.CopyFrom(numpy_helper.from_array(value * 1.01, w.name))  # 1% off: far beyond float32 rounding
    x = np.concatenate([b["pixels"] for b in _batches()])
    y = run(resnet, {"pixels": x})[0]
    diff = float(np.max(np.abs(y - run(changed, {"pixels": x})[0])))
    assert diff > ROUNDING * max(1.0, float(np.max(np.abs(y))))
    with pytest.raises(BadModelError, match=r"opset 13 -> 14 changes the outputs by up to .* not converted$"):
        check_conversion(resnet, changed, 14, _batches(), feeds_from="val")


@pytest.mark.parametrize("opset", [10, 23])
def test_opsets_outside_what_swapper_reads_are_refused(resnet, opset):
    with pytest.raises(UsageError, match=f"--opset {opset} is outside"):
        convert_opset(resnet, opset)

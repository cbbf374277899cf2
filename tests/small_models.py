"""Small hand-built ONNX models shared by several test files."""
import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper


def conv_classifier(weights: dict[str, np.ndarray], *, size: int, activations=("Relu", "Relu"), opset: int = 17,
                    ir_version: int = 8) -> onnx.ModelProto:
    """x [N, 3, size, size] -> Conv 3x3 (pad 1) -> act -> Conv 3x3 (pad 1) -> act -> GlobalAveragePool -> Flatten
    -> Gemm (transB) -> y [N, classes], checked with onnx.checker.

    ``weights`` holds w1, w2, wf (float32) and optionally the biases b1, b2, bf; any other entry becomes an
    initializer no node reads. ``activations`` names the op after each Conv (None: no activation there).
    Nodes are named (conv1, act1, conv2, act2, gap, flat, fc) so int8 weights can be matched to them.
    """
    def reads(data: str, weight: str, bias: str) -> list[str]:
        return [data, weight] + ([bias] if bias in weights else [])

    nodes, x = [], "x"
    for k, act in enumerate(activations, start=1):
        nodes.append(helper.make_node("Conv", reads(x, f"w{k}", f"b{k}"), [f"c{k}"], pads=[1, 1, 1, 1],
                                      name=f"conv{k}"))
        x = f"c{k}"
        if act is not None:
            nodes.append(helper.make_node(act, [x], [f"a{k}"], name=f"act{k}"))
            x = f"a{k}"
    nodes += [
        helper.make_node("GlobalAveragePool", [x], ["g"], name="gap"),
        helper.make_node("Flatten", ["g"], ["f"], name="flat"),
        helper.make_node("Gemm", reads("f", "wf", "bf"), ["y"], transB=1, name="fc"),
    ]
    classes = weights["wf"].shape[0]
    graph = helper.make_graph(
        nodes,
        "cnn",
        [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", 3, size, size])],
        [helper.make_tensor_value_info("y", TensorProto.FLOAT, ["N", classes])],
        [numpy_helper.from_array(value, name) for name, value in weights.items()],
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", opset)])
    model.ir_version = ir_version
    onnx.checker.check_model(model, full_check=True)
    return model

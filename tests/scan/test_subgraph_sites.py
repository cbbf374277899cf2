"""Sites inside If/Loop/Scan bodies: listed with function, role and body, swappable, main-graph ids untouched."""
from __future__ import annotations

import numpy as np
import onnx
import onnxruntime as ort
from onnx import TensorProto, helper, numpy_helper
from scipy.special import expit

from swapper import api
from swapper.core.model_io import name_unnamed_nodes
from swapper.scan.sites import find_sites

nd = helper.make_node


def vi(name, shape, elem=TensorProto.FLOAT):
    return helper.make_tensor_value_info(name, elem, shape)


def build(nodes, inputs, outputs, inits=()):
    graph = helper.make_graph(nodes, "t", inputs, outputs, [numpy_helper.from_array(np.asarray(v), k)
                                                             for k, v in inits])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    onnx.checker.check_model(model, full_check=True)
    model = onnx.shape_inference.infer_shapes(model, check_type=True, data_prop=True)
    name_unnamed_nodes(model)
    return model


def scan_model():
    """Scan over the rows of X; the body writes x·σ(x) of each row as a scan output."""
    body = helper.make_graph(
        [nd("Sigmoid", ["row"], ["s"]), nd("Mul", ["row", "s"], ["out"])], "scan_body",
        [vi("row", [4])], [vi("out", [4])])
    return build([nd("Scan", ["X"], ["S"], body=body, num_scan_inputs=1), nd("Identity", ["S"], ["Y"])],
                 [vi("X", [3, 4])], [vi("Y", [3, 4])])


def test_scan_body_silu_is_listed_as_an_output_site_in_its_body():
    (site,) = find_sites(scan_model())
    assert (site.id, site.function, site.form) == ("s1", "silu", "silu/mul-sigmoid")
    assert (site.role, site.supported, site.reason) == ("output", True, None)
    assert site.body == (("Scan_0", "body"),)
    # source: ONNX operator spec, Scan: scan output k stacks body output k over the iterations
    x = np.linspace(-3, 3, 12, dtype=np.float32).reshape(3, 4)
    sess = ort.InferenceSession(scan_model().SerializeToString(), providers=["CPUExecutionProvider"])
    np.testing.assert_allclose(sess.run(None, {"X": x})[0], x * expit(x.astype(np.float64)), rtol=1e-5, atol=1e-7)


def if_between(with_branch_sites: bool):
    """Tanh, an If (branches with or without activation sites), then Relu."""
    def branch(name, ops):
        nodes, cur = [], "T"
        for i, op in enumerate(ops):
            nodes.append(nd(op, [cur], [f"{name}{i}"]))
            cur = f"{name}{i}"
        nodes.append(nd("Identity", [cur], [f"{name}_out"]))
        return helper.make_graph(nodes, name, [], [vi(f"{name}_out", [2, 4])])

    ops = ["Softplus", "Tanh"] if with_branch_sites else ["Neg"]
    return build([nd("Tanh", ["X"], ["T"]),
                  nd("If", ["c"], ["I"], then_branch=branch("then", ops), else_branch=branch("else", ["Abs"])),
                  nd("MatMul", ["I", "W"], ["H"]), nd("Relu", ["H"], ["Y"])],
                 [vi("X", [2, 4]), vi("c", [], TensorProto.BOOL)], [vi("Y", [2, 4])],
                 [("W", np.eye(4, dtype=np.float32))])


def test_main_graph_ids_do_not_depend_on_what_bodies_hold():
    plain, busy = find_sites(if_between(False)), find_sites(if_between(True))
    main = [(s.id, s.function) for s in plain]
    assert main == [("s1", "tanh"), ("s2", "relu")]
    assert [(s.id, s.function) for s in busy if not s.body] == main
    inside = [(s.id, s.function, s.role, s.supported) for s in busy if s.body]
    # the branch sites feed the If's output, which a MatMul reads: hidden, not outputs
    assert inside == [("s3", "softplus", "hidden", True), ("s4", "tanh", "hidden", True)]


def test_body_site_reading_an_outer_tensor_takes_its_shape_from_the_enclosing_graph():
    body_site = [s for s in find_sites(if_between(True)) if s.function == "softplus"][0]
    assert body_site.input == "T" and body_site.shape == (2, 4) and body_site.producer == "Tanh"


def test_default_swap_plans_hidden_body_sites_like_main_graph_ones(tmp_path):
    path = tmp_path / "m.onnx"
    onnx.save(if_between(True), path)
    result = api.swap(path)
    # the Tanh; the branch's Softplus and Tanh; Relu is cheap
    assert [s.site_id for s in result.plan.swaps] == ["s1", "s3", "s4"]
    assert {k.site_id: k.reason for k in result.plan.skipped} == {"s2": "relu is already cheap"}

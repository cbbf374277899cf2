"""Bodies as models of their own: what they borrow from outside, what they give back, which ones can run alone.

The rule a borrowed or new name must keep is the ONNX IR spec's ("Names Within a Graph"): a body reads values of
its enclosing graphs by name and may not define a name they already use; onnx.checker.check_model(full_check=True)
enforces it, and onnxruntime runs what it accepts.
"""
from __future__ import annotations

import numpy as np
import onnx
from onnx import TensorProto, helper, parser
from testkit import as_loaded, run

from swapper.core.bodies import (
    body_as_model,
    find_body,
    model_names,
    outer_reads,
    put_body,
    standalone_body,
    why_not_runnable,
)
from swapper.core.graph import GraphIndex

IF = """
<ir_version: 8, opset_import: ["" : 17]>
g (float[N,4] x, bool c) => (float[N,4] y) <float[4,4] W = {1,2,0,0, 0,1,0,0, 0,0,1,0, 0,0,0,1}> {
   k = Constant<value = float[4] {1, 1, 2, 2}>()
   u = Abs(x)
   y = If(c) <then_branch = th () => (float[N,4] yt) { h = MatMul(u, W)  yt = Add(h, k) },
              else_branch = el () => (float[N,4] ye) { ye = Neg(x) }>
}
"""
THEN = (("If_2", "then_branch"),)


def test_outer_reads_split_constants_from_run_time_values():
    model = as_loaded(parser.parse_model(IF))
    reads = outer_reads(find_body(model, THEN))
    assert sorted(reads.constants) == ["W", "k"]  # an initializer and a Constant node's output
    assert reads.dynamic == ["u"]
    np.testing.assert_array_equal(onnx.numpy_helper.to_array(reads.constants["k"]), [1, 1, 2, 2])


def test_a_body_as_a_model_sees_outer_weights_and_reserves_every_name():
    model = as_loaded(parser.parse_model(IF))
    before = model.SerializeToString()
    body, borrowed = body_as_model(model, THEN)
    assert model.SerializeToString() == before  # the model is not changed
    assert borrowed == {"W", "k"}
    index = GraphIndex.of(body)
    assert index.const("W") is not None and index.shape("u") == ("N", 4)
    taken = {v.name for v in body.graph.value_info}
    assert model_names(model) <= taken | {t.name for t in body.graph.initializer} \
        | {o for n in body.graph.node for o in n.output} | {v.name for v in body.graph.output}


def test_putting_a_body_back_drops_what_it_borrowed():
    model = as_loaded(parser.parse_model(IF))
    body, borrowed = body_as_model(model, THEN)
    add = next(n for n in body.graph.node if n.op_type == "Add")
    add.op_type = "Sub"  # something visible: u·W − k instead of u·W + k
    put_body(model, THEN, body.graph, borrowed)
    branch = find_body(model, THEN).body
    assert [t.name for t in branch.initializer] == [] and all(v.type.HasField("tensor_type") for v in branch.value_info)
    onnx.checker.check_model(model, full_check=True)  # no name of the main graph defined again in the branch
    x = np.arange(8, dtype=np.float32).reshape(2, 4) - 4
    w = np.array([[1, 2, 0, 0], [0, 1, 0, 0], [0, 0, 1, 0], [0, 0, 0, 1]], np.float32)
    # source: ONNX operator spec, If (the then branch's output), MatMul and Sub (numpy semantics)
    np.testing.assert_allclose(run(model, {"x": x, "c": np.array(True)})[0], np.abs(x) @ w - [1, 1, 2, 2])


def test_a_standalone_body_computes_what_the_branch_computes():
    model = as_loaded(parser.parse_model(IF))
    x = np.linspace(-2, 2, 8, dtype=np.float32).reshape(2, 4)
    u = np.abs(x)
    alone = standalone_body(model, THEN, ["h", "yt"], {"u": u})
    assert [i.name for i in alone.graph.input] == ["u"]
    _, yt = run(alone, {"u": u})
    (y,) = run(model, {"x": x, "c": np.array(True)})
    np.testing.assert_array_equal(yt, y)  # source: ONNX operator spec, If returns the taken branch's outputs


def test_bodies_that_cannot_run_alone_say_why():
    # SequenceMap (ONNX operator spec, opset 17) carries a body too, but is none of If / Loop / Scan
    seq_body = helper.make_graph([helper.make_node("Sigmoid", ["e"], ["o"])], "m",
                                 [helper.make_tensor_value_info("e", TensorProto.FLOAT, [2])],
                                 [helper.make_tensor_value_info("o", TensorProto.FLOAT, [2])])
    node = helper.make_node("SequenceMap", ["s"], ["r"], body=seq_body, name="map")
    assert "bodies of SequenceMap are not run" in why_not_runnable([(node, "body", seq_body)])
    # a Loop carrying a sequence: the body's state is not a tensor
    loop_body = helper.make_graph(
        [helper.make_node("Identity", ["c"], ["co"]), helper.make_node("Identity", ["q"], ["qo"])], "b",
        [helper.make_tensor_value_info("i", TensorProto.INT64, []),
         helper.make_tensor_value_info("c", TensorProto.BOOL, []),
         helper.make_tensor_sequence_value_info("q", TensorProto.FLOAT, None)],
        [helper.make_tensor_value_info("co", TensorProto.BOOL, []),
         helper.make_tensor_sequence_value_info("qo", TensorProto.FLOAT, None)])
    loop = helper.make_node("Loop", ["M", "", "q0"], ["qN"], body=loop_body, name="L")
    why = why_not_runnable([(loop, "body", loop_body)])
    assert why == "inside the body of Loop 'L'; the body passes 'q', a sequence and not a tensor, " \
                  "which the calibration cannot feed"
    assert why_not_runnable([(node, "then_branch", seq_body)]).startswith("inside the then_branch of SequenceMap")

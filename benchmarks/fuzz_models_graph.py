"""Structure-level model mutations on nodes, ops, attributes, subgraphs, names and metadata.

Each is ``(model, rng, ctx) -> ModelProto | bytes`` and edits the given copy in place (see fuzz_models.py).
"""
from __future__ import annotations

import numpy as np
import onnx
from fuzz_graph_tools import STANDARD_OPS, edges, patch_bytes, pick_node, rename_everywhere, set_attr
from onnx import TensorProto, helper, numpy_helper

# ---------------------------------------------------------------- nodes and edges


def node_drop(m, rng, ctx):
    node = pick_node(m, rng)
    m.graph.node.remove(node)
    return m


def node_duplicate(m, rng, ctx):
    node = pick_node(m, rng)
    copy = m.graph.node.add()
    copy.CopyFrom(node)
    if rng.random() < 0.5:
        copy.name = node.name + "_dup"  # same outputs, new name: two producers of one tensor
    return m


def node_rename_edge(m, rng, ctx):
    node = pick_node(m, rng)
    which = node.output if rng.random() < 0.5 or not node.input else node.input
    k = rng.randrange(len(which))
    which[k] = rng.choice(("dangling", which[k] + "_x", "", "pixels", "logits"))
    return m


def node_reverse_order(m, rng, ctx):
    nodes = list(m.graph.node)
    del m.graph.node[:]
    m.graph.node.extend(reversed(nodes) if rng.random() < 0.5 else rng.sample(nodes, len(nodes)))
    return m


def node_cycle(m, rng, ctx):
    nodes = [n for n in m.graph.node if n.input and n.output]
    i = rng.randrange(len(nodes))
    j = rng.randrange(i, len(nodes))
    nodes[i].input[0] = nodes[j].output[0]  # j == i: a node reading its own output
    return m


def op_wrong(m, rng, ctx):
    pick_node(m, rng).op_type = rng.choice(STANDARD_OPS)
    return m


def op_unknown(m, rng, ctx):
    pick_node(m, rng).op_type = rng.choice(("FuzzOp", "", "sigmoid", "Sigmoid ", "[red]Op[/]", "Ω" * 50))
    return m


def op_domain(m, rng, ctx):
    node = pick_node(m, rng)
    node.domain = rng.choice(("com.example", "ai.onnx.ml", "com.microsoft", "ai.onnx", "[/b]", "x" * 5000))
    if rng.random() < 0.5:
        m.opset_import.add(domain=node.domain, version=rng.choice((1, 0, -1, 999)))
    return m


def op_costly_variant(m, rng, ctx):
    """Turn an activation into a newer single op (Gelu/Mish/HardSwish/Elu/Selu...) the opset may not have."""
    node = pick_node(m, rng, ("Sigmoid", "Tanh", "Erf", "Softplus", "Relu"))
    if node is None:
        return m
    node.op_type = rng.choice(("Gelu", "Mish", "HardSwish", "HardSigmoid", "Elu", "Selu", "Celu", "Softsign",
                               "ThresholdedRelu", "LeakyRelu", "PRelu", "Swish"))
    return m


# ---------------------------------------------------------------- attributes


_BAD_VALUES = (0, -1, 1, 3, 2**31, 2**62, -(2**62), 1.5, float("nan"), float("inf"), -0.0, 1e38, "", "BOGUS",
               "SAME_UPPER", [0, 0], [-1, -1, -1, -1], [], [1], [2**40, 1], [0.5, 0.5])


def attr_bad(m, rng, ctx):
    node = pick_node(m, rng, ("Conv", "Gemm", "Flatten", "MaxPool", "BatchNormalization", "Constant", "Softplus",
                          "GlobalAveragePool"))
    if node is None:
        node = pick_node(m, rng)
    choice = rng.random()
    names = [a.name for a in node.attribute] or ["axis"]
    name = rng.choice(names + ["group", "strides", "pads", "dilations", "kernel_shape", "axis", "transB",
                               "alpha", "epsilon", "auto_pad", "fuzz_attr", ""])
    if choice < 0.7:
        value = rng.choice(_BAD_VALUES)
        if value == [] or value == "":
            value = rng.choice(([], "")) if name else 0
        try:
            set_attr(node, name, value)
        except (ValueError, TypeError):
            set_attr(node, name, 0)
    elif choice < 0.85 and node.attribute:  # duplicate one
        node.attribute.append(node.attribute[0])
    else:  # drop them all (Constant loses its value)
        del node.attribute[:]
    return m


def attr_wrong_type(m, rng, ctx):
    node = pick_node(m, rng, ("Conv", "Gemm", "Flatten", "MaxPool", "BatchNormalization", "Constant"))
    if node is None or not node.attribute:
        return attr_bad(m, rng, ctx)
    a = rng.choice(node.attribute)
    value = rng.choice((1.0, 7, "text", [1.0, 2.0], ["a", "b"], numpy_helper.from_array(np.ones(3, np.float32))))
    node.attribute.remove(a)
    node.attribute.append(helper.make_attribute(a.name, value))
    return m


# ---------------------------------------------------------------- subgraphs


def _site_node(m, rng):
    return pick_node(m, rng, ("Sigmoid", "Tanh", "Erf", "Softplus", "Relu")) or pick_node(m, rng)


def _branch(name, node, rng, variant):
    inner = onnx.NodeProto()
    inner.CopyFrom(node)
    inner.name = f"{name}_{node.name}"
    out = f"{name}_out"
    del inner.output[:]
    inner.output.append(out)
    if variant == "undefined":
        inner.input[0] = "undefined_outer"
    nodes = [] if variant == "empty" else [inner]
    return helper.make_graph(nodes, name, [], [helper.make_tensor_value_info(out, TensorProto.FLOAT, None)])


def subgraph_if(m, rng, ctx):
    node = _site_node(m, rng)
    variant = rng.choice(("ok", "ok", "empty", "undefined", "nested", "missing_else", "cond_input", "shadow"))
    then_b, else_b = _branch("then", node, rng, variant), _branch("else", node, rng, "ok")
    if variant == "nested":
        inner_if = helper.make_node("If", ["fuzz_cond"], ["then_out"], then_branch=_branch("t2", node, rng, "ok"),
                                    else_branch=_branch("e2", node, rng, "ok"), name="nested_if")
        then_b = helper.make_graph([inner_if], "then", [], [helper.make_tensor_value_info("then_out",
                                                                                          TensorProto.FLOAT, None)])
    if variant == "shadow":  # the branch re-defines a name of the outer graph
        then_b.node[0].output[0] = node.input[0]
        then_b.output[0].name = node.input[0]
    attrs = {"then_branch": then_b} if variant == "missing_else" else {"then_branch": then_b, "else_branch": else_b}
    cond = "pixels" if variant == "cond_input" else "fuzz_cond"
    wrapped = helper.make_node("If", [cond], list(node.output), name=f"if_{node.name}", **attrs)
    m.graph.initializer.append(numpy_helper.from_array(np.array(rng.random() < 0.5), "fuzz_cond"))
    idx = list(m.graph.node).index(node)
    m.graph.node.remove(node)
    m.graph.node.insert(idx, wrapped)
    return m


def subgraph_loop(m, rng, ctx):
    node = _site_node(m, rng)
    inner = onnx.NodeProto()
    inner.CopyFrom(node)
    inner.input[0] = "v_in"
    del inner.output[:]
    inner.output.append("v_out")
    body = helper.make_graph(
        [inner, helper.make_node("Identity", ["cond_in"], ["cond_out"])], "body",
        [helper.make_tensor_value_info("iter", TensorProto.INT64, []),
         helper.make_tensor_value_info("cond_in", TensorProto.BOOL, []),
         helper.make_tensor_value_info("v_in", TensorProto.FLOAT, None)],
        [helper.make_tensor_value_info("cond_out", TensorProto.BOOL, []),
         helper.make_tensor_value_info("v_out", TensorProto.FLOAT, None)])
    trips = rng.choice((1, 1, 0, 3, -1))
    m.graph.initializer.append(numpy_helper.from_array(np.array(trips, np.int64), "fuzz_trips"))
    m.graph.initializer.append(numpy_helper.from_array(np.array(True), "fuzz_true"))
    loop = helper.make_node("Loop", ["fuzz_trips", "fuzz_true", node.input[0]], [node.output[0]], body=body,
                            name=f"loop_{node.name}")
    idx = list(m.graph.node).index(node)
    m.graph.node.remove(node)
    m.graph.node.insert(idx, loop)
    return m


def local_function(m, rng, ctx):
    """Move one activation into a model-local function called from the graph."""
    node = _site_node(m, rng)
    inner = onnx.NodeProto()
    inner.CopyFrom(node)
    inner.input[0], inner.output[0] = "fx", "fy"
    fn = helper.make_function("local.fuzz", "Act", ["fx"], ["fy"], [inner],
                              [helper.make_opsetid("", 17)] if rng.random() < 0.7 else [])
    m.functions.append(fn)
    node.op_type, node.domain = "Act", "local.fuzz"
    del node.attribute[:]
    del node.input[1:]
    if rng.random() < 0.8:
        m.opset_import.add(domain="local.fuzz", version=1)
    return m


# ---------------------------------------------------------------- names, metadata, unusual layers


def names_duplicate(m, rng, ctx):
    a, b = rng.sample(list(m.graph.node), 2)
    b.name = a.name
    if rng.random() < 0.3:  # an initializer named like an edge
        rng.choice(list(m.graph.initializer)).name = rng.choice(edges(m))
    return m


def names_empty(m, rng, ctx):
    choice = rng.random()
    if choice < 0.4:
        for n in m.graph.node:
            n.name = ""
    else:
        old = rng.choice(edges(m))
        for n in m.graph.node:
            for seq in (n.input, n.output):
                for k, v in enumerate(seq):
                    if v == old:
                        seq[k] = ""
    return m


def names_weird(m, rng, ctx):
    style = rng.choice(("long", "markup", "newline", "unicode", "swapper", "slash", "space"))
    new = {"long": "n" * rng.choice((300, 10_000, 200_000)), "markup": rng.choice(("[red]x", "[/b]", "[bold]", "[/]")),
           "newline": "line1\nline2", "unicode": "\u202e\u0000?\U0001F600", "swapper": "swapper/s1/a",
           "slash": "../../etc/passwd", "space": " "}[style]
    if rng.random() < 0.5:
        node = pick_node(m, rng)
        node.name = new
    else:
        names = edges(m) + [t.name for t in m.graph.initializer] + [m.graph.input[0].name, m.graph.output[0].name]
        rename_everywhere(m, rng.choice(names), new)
    return m


def metadata(m, rng, ctx):
    style = rng.choice(("markup", "long", "verdict", "dup", "bytes", "doc"))
    if style == "markup":
        m.producer_name, m.doc_string, m.graph.name = "[/b]", "[red]x[/red", "[bold]g"
    elif style == "long":
        m.metadata_props.add(key="k" * 1000, value="v" * 1_000_000)
    elif style == "verdict":  # a key swapper writes itself
        m.metadata_props.add(key="swapper.verdict", value=rng.choice(("{}", "not json", "[/b]")))
    elif style == "dup":
        for _ in range(2):
            m.metadata_props.add(key="dup", value="x\ny")
    elif style == "bytes":  # invalid UTF-8 where protobuf promises a string
        m.metadata_props.add(key="bin", value="@@FUZZ@@")
        return patch_bytes(m.SerializeToString(), "@@FUZZ@@", b"\xff\xfe\x00\x80\xc3(\xa0\xa1")
    else:
        m.graph.doc_string = "\x00\x1b[31m" * 1000
        m.model_version = -1
    return m


def layer_params(m, rng, ctx):
    """Valid-looking but unusual layer settings: Gemm flags, BatchNorm stats, Conv geometry, missing bias."""
    node = pick_node(m, rng, ("Gemm", "BatchNormalization", "Conv"))
    if node.op_type == "Gemm":
        set_attr(node, rng.choice(("alpha", "beta")), rng.choice((0.0, -1.0, 1e-30, 1e30)))
        if rng.random() < 0.5 and len(node.input) == 3:
            del node.input[2]
    elif node.op_type == "BatchNormalization":
        var = next(t for t in m.graph.initializer if t.name == node.input[4])
        arr = numpy_helper.to_array(var).copy()
        arr[...] = rng.choice((0.0, -1.0, 1e30))
        var.CopyFrom(numpy_helper.from_array(arr, var.name))
        set_attr(node, "epsilon", rng.choice((0.0, 1e-5, 10.0)))
    else:
        if rng.random() < 0.5 and len(node.input) == 3:
            del node.input[2]
        else:
            set_attr(node, rng.choice(("pads", "strides", "dilations")), rng.choice(([0, 0, 0, 0], [2, 2],
                                                                                        [3, 3, 3, 3], [1, 1])))
    return m


def site_rewire(m, rng, ctx):
    """Activation sites in odd places: reading the graph input, feeding the output, read twice, on a constant."""
    node = pick_node(m, rng, ("Sigmoid", "Tanh", "Erf", "Softplus", "Mul"))
    style = rng.choice(("input", "output", "constant", "shared"))
    if node is None:
        return m
    if style == "input":
        node.input[0] = m.graph.input[0].name
    elif style == "output":
        m.graph.output.append(helper.make_tensor_value_info(node.output[0], TensorProto.FLOAT, None))
    elif style == "constant":
        node.input[0] = rng.choice(list(m.graph.initializer)).name
    else:
        extra = helper.make_node("Sigmoid", [node.input[0]], ["fuzz_shared"], name="fuzz_shared")
        m.graph.node.append(extra)
        m.graph.output.append(helper.make_tensor_value_info("fuzz_shared", TensorProto.FLOAT, None))
    return m

"""ONNX plumbing with no idea of sites or plans: graph index, model I/O, emitting nodes, graph surgery, onnxruntime sessions, tensor cache, graph slices, Conv geometry."""

"""Graphs as demur wrote them before the exporter moved to torch.onnx.export: noise drawn
inside the graph by RandomNormal nodes seeded with ``node_seed``. Old bundles hold such
files, and the engine must keep reseeding and serving them."""

from __future__ import annotations

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper

from demur.serve.core.noise import node_seed


def legacy_sampler_graph(inputs: int, outputs: int, draws: int, seed: int) -> onnx.ModelProto:
    """x float32[B, inputs] -> draws float32[S, B, outputs] = x @ (mu + 0.1 eps) + (b + 0.1 eps_b),
    four RandomNormal nodes (two per tensor, as the radial sampler had), seeds node_seed(seed, i)."""
    rng = np.random.default_rng(0)
    inits = [numpy_helper.from_array(rng.normal(size=(inputs, outputs)).astype(np.float32), "mu_w"),
             numpy_helper.from_array(rng.normal(size=(1, outputs)).astype(np.float32), "mu_b"),
             numpy_helper.from_array(np.array(0.1, np.float32), "sigma")]
    nodes = []
    for i, (name, shape) in enumerate((("eps_w", [draws, inputs, outputs]), ("r_w", [draws, 1, 1]),
                                       ("eps_b", [draws, 1, outputs]), ("r_b", [draws, 1, 1]))):
        nodes.append(helper.make_node("RandomNormal", [], [name], shape=shape, dtype=TensorProto.FLOAT,
                                      mean=0.0, scale=1.0, seed=node_seed(seed, i)))
    nodes += [
        helper.make_node("Mul", ["eps_w", "r_w"], ["pw"]), helper.make_node("Mul", ["pw", "sigma"], ["dw"]),
        helper.make_node("Add", ["dw", "mu_w"], ["w"]), helper.make_node("MatMul", ["x", "w"], ["y"]),
        helper.make_node("Mul", ["eps_b", "r_b"], ["pb"]), helper.make_node("Mul", ["pb", "sigma"], ["db"]),
        helper.make_node("Add", ["y", "db"], ["y2"]), helper.make_node("Add", ["y2", "mu_b"], ["draws"]),
    ]
    graph = helper.make_graph(
        nodes, "legacy", [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["B", inputs])],
        [helper.make_tensor_value_info("draws", TensorProto.FLOAT, [draws, "B", outputs])], initializer=inits)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)], producer_name="demur")
    model.ir_version = 8
    onnx.checker.check_model(model, full_check=True)
    return model

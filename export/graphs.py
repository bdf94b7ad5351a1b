"""A ``DrawNetwork`` written as one self-contained ONNX file, with ``torch.onnx.export``.

Which exporter: torch 2.13 offers the dynamo exporter (``dynamo=True``, the
default) and the TorchScript one (``dynamo=False``, deprecated but present).
The dynamo exporter needs ``onnxscript``, which is not a dependency of ours;
measured on a small conv net with a grouped convolution, it took 7.9 s for
the first export and 2.1 s after, against 1.5 s for the TorchScript exporter,
which also keeps our input names (``signs.flip.L0`` ...) verbatim and writes
one file with the weights inside. So ``dynamo=False``, its deprecation
warning silenced here, at opset 17.

Every graph follows the bundle contract (``serve/core/bundle.py``)::

    input  "x":     float32[B, *input_shape]   already standardised
    inputs noise:   float32, fixed shapes, named by law (export/draws.py, export/flip.py)
    output "draws": float32[S, B, K]           logits, or (mean, log-variance)

The one place torch's export exceptions become ours: ``GraphBuildError``
naming the layer (found by exporting each leaf module alone on the input it
saw) and torch's message, never a raw traceback.

The seed rule of the random nodes in sampler graphs written by earlier versions
of demur is the bundle format's (``node_seed``, ``SEED_MODULUS`` in
serve/core/noise.py); the engine still reseeds such graphs at load by it.
"""

from __future__ import annotations

import io
import warnings
from pathlib import Path
from typing import Any

import onnx
import torch
from torch import nn

from demur.export.draws import DrawNetwork
from demur.export.errors import GraphBuildError

__all__ = ["OPSET", "export_graph"]

OPSET = 17
"""ONNX opset of every graph (onnxruntime >= 1.14 runs it)."""

def _export(module: nn.Module, args: tuple[torch.Tensor, ...], names: list[str] | None,
            dynamic: dict[str, dict[int, str]] | None) -> bytes:
    buf = io.BytesIO()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the TorchScript exporter's deprecation notice, tracer notes
        torch.onnx.export(module, args, buf, input_names=names, output_names=["draws"] if names else None,
                          dynamic_axes=dynamic, opset_version=OPSET, dynamo=False, do_constant_folding=True)
    return buf.getvalue()


def export_graph(net: DrawNetwork, path: str | Path, *, name: str) -> int:
    """Write ``net`` as ONNX to ``path``; return its size in bytes. Refusals are ``GraphBuildError``."""
    x = torch.zeros((2, *net.input_shape))
    noise = tuple(torch.ones(spec.shape) for spec in net.noise)
    names = ["x", *(spec.name for spec in net.noise)]
    try:
        with torch.no_grad():
            data = _export(net, (x, *noise), names, {"x": {0: "B"}, "draws": {1: "B"}})
    except GraphBuildError:
        raise
    except Exception as exc:  # torch raises many unrelated types here; this is the one place they become ours
        if net.shared:  # ran in torch, but the ONNX tracer cannot follow the shared forward: per draw, said
            first = str(exc).strip().splitlines()[0] if str(exc).strip() else ""
            net.fall_back(f"the shared forward did not export to ONNX ({type(exc).__name__}: {first})")
            return export_graph(net, path, name=name)
        raise _culprit(net, x, exc) from exc
    model = onnx.load_from_string(data)
    if len(data) >= (2 << 30) - (1 << 20):
        raise GraphBuildError(f"the {name} graph is {len(data) / 1e9:.2f} GB; ONNX files are limited to 2 GB: "
                              "export fewer draws", field="draws")
    _fix_output_shape(model, net)
    model.producer_name = "demur"
    model.doc_string = (f"demur {name} graph ({net.family}): {net.S} draws per call, output draws[S, B, K]")
    try:
        onnx.checker.check_model(model, full_check=True)
    except (onnx.checker.ValidationError, onnx.shape_inference.InferenceError) as exc:
        raise GraphBuildError(f"the {name} graph failed ONNX validation: {exc}", field="graph") from exc
    data = model.SerializeToString()
    Path(path).write_bytes(data)
    return len(data)


def _fix_output_shape(model: onnx.ModelProto, net: DrawNetwork) -> None:
    """Declare ``draws`` as [S, B, K] (the tracer leaves reshaped dims symbolic)."""
    with torch.no_grad():
        k = int(net(torch.zeros((1, *net.input_shape)), *(torch.ones(s.shape) for s in net.noise)).shape[-1])
    dims = model.graph.output[0].type.tensor_type.shape.dim
    while len(dims):
        dims.pop()
    for value in (net.S, "B", k):
        d = dims.add()
        if isinstance(value, int):
            d.dim_value = value
        else:
            d.dim_param = value


def _culprit(net: DrawNetwork, x: torch.Tensor, exc: Exception) -> GraphBuildError:
    """Name the first leaf module that torch cannot export on its own input, else the model's forward."""
    message = f"{type(exc).__name__}: {str(exc).strip().splitlines()[0] if str(exc).strip() else ''}"
    seen: list[tuple[str, nn.Module, tuple[Any, ...]]] = []
    hooks = []

    def record(name: str) -> Any:
        def hook(mod: nn.Module, args: tuple[Any, ...]) -> None:  # returning a value would replace args
            if all(isinstance(a, torch.Tensor) for a in args):
                seen.append((name, mod, args))
        return hook

    for member in net.members:
        for mod_name, mod in member.named_modules():
            if not list(mod.children()) and mod_name:
                hooks.append(mod.register_forward_pre_hook(record(mod_name)))
    # the per-draw forward calls every module the user wrote (the traced one inlines their forwards)
    plan, net._plan = net._plan, None
    try:
        with torch.no_grad():
            net(x, *(torch.ones(s.shape) for s in net.noise))
    except Exception as run_exc:  # the forward itself fails in torch: that is the message to show
        message = f"{type(run_exc).__name__}: {run_exc}"
    finally:
        net._plan = plan
        for h in hooks:
            h.remove()
    for mod_name, mod, args in seen:
        if getattr(mod, "_draw_mode", None) is not None:
            continue  # demur's own layers are known to export
        try:
            with torch.no_grad():
                _export(mod, tuple(a.detach() for a in args), None, None)
        except Exception as leaf_exc:
            first = str(leaf_exc).strip().splitlines()[0] if str(leaf_exc).strip() else type(leaf_exc).__name__
            return GraphBuildError(
                f"torch cannot export layer '{mod_name}' ({type(mod).__name__}) to ONNX: {first}; replace it with "
                "a layer torch can export, or write its forward with exportable torch operations", field=mod_name)
    top = type(net.members[0]).__name__
    return GraphBuildError(f"torch cannot export the forward of {top} to ONNX: {message}; every layer exports on "
                           "its own, so look at the operations in its forward", field="model")



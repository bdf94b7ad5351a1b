"""demur's torch side: variational layers, training, and the bundle exporter.

The public way in for your own model::

    from demur.export import export_model, input_spec

May import ``serve``'s bundle schema; ``serve`` never imports this package."""

from demur.export.exporter import Inputs, export_model, input_spec

__all__ = ["Inputs", "export_model", "input_spec"]

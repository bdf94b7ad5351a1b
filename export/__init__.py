"""demur's torch side: variational layers, training, and the bundle exporter.

May import ``serve``'s bundle schema; ``serve`` never imports this package."""

"""demur's torch side: variational layers, training, the bundle exporter, calibration and evaluation.

May import ``serve``'s bundle schema; ``serve`` never imports this package.

Public calls, for your own model and your own data::

    from demur.export import export_model, input_spec, calibrate, evaluate

    spec = input_spec(X_train)                                  # standardisation, range, drift reference
    export_model(model, "build/bundle", inputs=spec, labels=labels, reference=X_val)
    calibrate("build/bundle", X_holdout, y_holdout, target_accuracy=0.98, confidence=0.9)
    evaluate("build/bundle", X_test, y_test, out="build/evaluation")
"""

from demur.export.evaluation import evaluate
from demur.export.exporter import Inputs, export_model, input_spec
from demur.export.calibration import calibrate

__all__ = ["Inputs", "calibrate", "evaluate", "export_model", "input_spec"]

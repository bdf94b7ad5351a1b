"""Every error the torch side raises on purpose.

All of them descend from ``demur.serve.errors.DemurError`` so the ``demur`` command
prints their message instead of a traceback, and each is also the built-in it
most resembles::

    DemurError                               (serve/errors.py)
    └── ExportError
        ├── LayerConfigError(ValueError)     unknown posterior, bad shape or prior scale
        ├── DatasetError(ValueError)         data cannot be turned into splits
        │   ├── DatasetNotFound(FileNotFoundError)   no such file / built-in name
        │   ├── EmptyDataset                 no rows (or too few to split)
        │   ├── TargetColumnMissing(KeyError)  --target names no column
        │   └── NonNumericFeature            a feature cell is not a number
        ├── TrainingError(RuntimeError)      the loss diverged (NaN / inf)
        ├── CheckpointError(ValueError)      checkpoint missing, foreign or of another version
        └── GraphBuildError(ValueError)      a model the ONNX graph builder cannot express

Messages say what was received and what was expected, and name the column,
row or file at fault (``field`` carries the column or key).
"""

from __future__ import annotations

from demur.serve.errors import DemurError

__all__ = [
    "CheckpointError",
    "DatasetError",
    "DatasetNotFound",
    "EmptyDataset",
    "ExportError",
    "GraphBuildError",
    "LayerConfigError",
    "NonNumericFeature",
    "TargetColumnMissing",
    "TrainingError",
]


class ExportError(DemurError):
    """Root of the torch side's errors."""

    status = 500
    code = "export_failed"


class LayerConfigError(ExportError, ValueError):
    code = "bad_layer_config"


class DatasetError(ExportError, ValueError):
    status = 400
    code = "bad_dataset"


class DatasetNotFound(DatasetError, FileNotFoundError):
    code = "dataset_not_found"


class EmptyDataset(DatasetError):
    code = "empty_dataset"


class TargetColumnMissing(DatasetError, KeyError):
    code = "target_column_missing"

    def __str__(self) -> str:  # KeyError would quote the message
        return self.message


class NonNumericFeature(DatasetError):
    code = "non_numeric_feature"


class TrainingError(ExportError, RuntimeError):
    code = "training_failed"


class CheckpointError(ExportError, ValueError):
    code = "bad_checkpoint"


class GraphBuildError(ExportError, ValueError):
    code = "graph_build_failed"

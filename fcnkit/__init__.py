"""fcnkit: fully convolutional segmentation nets, built from a short config, trained and run on a CPU.

The public API is imported on first use (PEP 562), so ``fcnkit --help`` or ``fcnkit describe`` does not pay for
torchvision and the training stack.
"""

from __future__ import annotations

import importlib
import sys
import types
from typing import Any

from fcnkit.errors import ConfigError, DataError, FcnkitError, ModelFileError

__version__ = "0.1.0"

# public name -> module that defines it
_API = {
    "Model": "fcnkit.model",
    "Config": "fcnkit.config", "load_config": "fcnkit.config",
    "build_model": "fcnkit.nets", "describe": "fcnkit.describe",
    "load_classes": "fcnkit.data.classes", "ClassTable": "fcnkit.data.classes",
    "band_stats": "fcnkit.data.dataset", "check_dataset": "fcnkit.data.dataset", "find_samples": "fcnkit.data.dataset",
    "read_image": "fcnkit.data.imageio", "read_mask": "fcnkit.data.imageio",
    "make_scenes": "fcnkit.data.scenes", "write_mosaic": "fcnkit.data.scenes",
    "train": "fcnkit.train",
    "predict_scores": "fcnkit.inference.scan", "segment_image": "fcnkit.inference.segment",
    "segment_images": "fcnkit.inference.segment",
    "evaluate": "fcnkit.evaluate", "write_report": "fcnkit.report", "export_model": "fcnkit.export",
    "convert_classifier": "fcnkit.convert", "grow_segmenter": "fcnkit.convert",
    "fit_temperature": "fcnkit.calibration", "reliability": "fcnkit.calibration",
    "assessment_table": "fcnkit.assessment", "plan_sample_size": "fcnkit.assessment",
    "draw_sample": "fcnkit.sampling", "assess_sample": "fcnkit.sampling",
}

__all__ = ["ConfigError", "DataError", "FcnkitError", "ModelFileError", *_API]


def __getattr__(name: str) -> Any:
    if name in _API:
        value = getattr(importlib.import_module(_API[name]), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'fcnkit' has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted(__all__)


class _PublicApi(types.ModuleType):
    """Keeps ``fcnkit.train``, ``fcnkit.evaluate`` and ``fcnkit.describe`` the functions: importing a submodule
    of the same name would otherwise bind the module object over the function."""

    def __setattr__(self, name: str, value: Any) -> None:
        if name in _API and isinstance(value, types.ModuleType):
            return
        super().__setattr__(name, value)


sys.modules[__name__].__class__ = _PublicApi


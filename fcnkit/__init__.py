"""fcnkit: fully convolutional segmentation nets, built from a short config, trained and run on a CPU."""

from fcnkit.config import Config, load_config
from fcnkit.describe import describe
from fcnkit.errors import ConfigError, DataError, FcnkitError, ModelFileError
from fcnkit.export import export_model
from fcnkit.modelfile import load_model, save_model
from fcnkit.nets import build_model

__version__ = "0.1.0"

__all__ = [
    "Config", "ConfigError", "DataError", "FcnkitError", "ModelFileError",
    "build_model", "describe", "load_config",
    "export_model",
    "load_model", "save_model",
]

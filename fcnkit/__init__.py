"""fcnkit: fully convolutional segmentation nets, built from a short config, trained and run on a CPU."""

from fcnkit.config import Config, load_config
from fcnkit.convert import convert_classifier, grow_segmenter
from fcnkit.data.classes import load_classes
from fcnkit.data.dataset import band_stats, check_dataset, find_samples
from fcnkit.data.imageio import read_image, read_mask
from fcnkit.data.scenes import make_scenes, write_mosaic
from fcnkit.describe import describe
from fcnkit.errors import ConfigError, DataError, FcnkitError, ModelFileError
from fcnkit.evaluate import evaluate
from fcnkit.export import export_model
from fcnkit.modelfile import load_model, save_model
from fcnkit.nets import build_model
from fcnkit.report import write_report
from fcnkit.tiling import predict_scores, segment_image, segment_images
from fcnkit.train import train

__version__ = "0.1.0"

__all__ = [
    "Config", "ConfigError", "DataError", "FcnkitError", "ModelFileError",
    "build_model", "describe", "load_config",
    "evaluate", "export_model", "write_report",
    "load_model", "save_model", "train",
    "convert_classifier", "grow_segmenter",
    "predict_scores", "segment_image", "segment_images",
    "load_classes", "read_image", "read_mask", "find_samples", "check_dataset", "band_stats",
    "make_scenes", "write_mosaic",
]

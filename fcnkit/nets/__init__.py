"""Config-built fully convolutional nets and the reader of their geometry."""

from fcnkit.nets.graph import layer_graph
from fcnkit.nets.segnet import SegNet, build_model

__all__ = ["SegNet", "build_model", "layer_graph"]

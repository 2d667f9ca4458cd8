"""Nets: the encoder–decoder family built from a config, the any-size wrapper every net shares, and the reader
of a net's geometry."""

from fcnkit.nets.encoder_decoder import EncoderDecoder, build_model
from fcnkit.nets.graph import layer_graph
from fcnkit.nets.padded import PaddedNet

__all__ = ["EncoderDecoder", "PaddedNet", "build_model", "layer_graph"]

"""Inference: mapping images of any size with a model.

One concept per module: ``engines`` (the forward pass of a batch, by torch or another runtime), ``rowstream``
(exact inference in full-width bands of rows), ``tiles`` (overlapping tiles blended by a window), ``scan`` (the
choice between them and whole-image inference, and class scores of a whole image), ``segment`` (images to files).
"""

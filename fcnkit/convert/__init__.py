"""Turn a trained image classifier into a fully convolutional net, prove the two agree, grow a segmenter.

* :func:`convert_classifier` gives a :class:`Conversion`: the dense net (class scores for every window of an
  input of any size), the same up-sampled to the input's size and wrapped as a
  :class:`~fcnkit.nets.SegNet` so tiled inference can run it, and its :class:`Certificate`;
* :func:`grow_segmenter` makes a trainable segmenter of it (FCN-32s/16s/8s, Long et al. 2015);
* :func:`save_converted` writes either as a model file that ``load_model``, tiling and training read.
"""

from __future__ import annotations

from dataclasses import dataclass

from torch import nn

from fcnkit.convert.dense import (
    AlignedNet,
    Certificate,
    ConvertError,
    DenseClassifier,
    Recipe,
    build_dense,
    certify,
    plan,
    score_map,
)
from fcnkit.convert.grow import DENSE_KIND, GROWN_KIND, class_table, make_net, rebuild, save_converted
from fcnkit.convert.sources import Classifier, load_classifier


@dataclass(frozen=True)
class Conversion:
    """``net``: full-resolution score maps (N×B×H×W → N×C×H×W); ``dense``: the coarse map, one score per
    window; ``certificate``: the equivalence check and geometry."""

    net: AlignedNet
    dense: DenseClassifier
    certificate: Certificate


def convert_classifier(module: nn.Module, native_size: int, *, global_pool: str = "auto",
                       keep: tuple[int, ...] | None = None, sizes: tuple[int, ...] = ()) -> Conversion:
    """Convert ``module`` (put in eval mode), trained on native_size×native_size inputs, into a dense
    predictor and certify it on random inputs. ``global_pool``: ``auto``, ``cam`` or ``window`` (what an
    adaptive global pool becomes, see fcnkit.convert.dense); ``keep``: classifier outputs to keep in
    ``net`` (all by default); ``sizes``: extra input sides whose output side the certificate states.
    Raises ConvertError when the head is not understood, the native size does not fit it, or the
    converted net disagrees with the classifier by more than the tolerance."""
    module.eval()
    p = plan(module, native_size, global_pool=global_pool)
    dense = build_dense(p)
    cert = certify(module, dense, p, tuple(sizes))
    if not cert.passed:
        raise ConvertError(f"the converted net differs from the classifier by {cert.max_abs_diff:.3g} at the native "
                           f"size (tolerance {cert.tolerance:g})")
    recipe = Recipe(native_size, global_pool=global_pool, keep=None if keep is None else tuple(keep))
    return Conversion(score_map(p, dense, cert.stride, recipe), dense, cert)


def grow_segmenter(module: nn.Module, native_size: int, *, classes: int | None = None,
                   keep: tuple[int, ...] | None = None, skips: tuple[int, ...] = (), bands: int | None = None,
                   global_pool: str = "auto") -> AlignedNet:
    """A segmenter grown from ``module``: its trunk and hidden dense layers (as convolutions), a score
    layer for ``classes`` new classes (zero-initialised) or for the classifier outputs ``keep``, learnable
    bilinear-initialised up-sampling, and 1×1 scores of the trunk stages at ``skips`` (e.g. (16, 8) for
    FCN-8s) fused on the way. ``bands`` above the classifier's widens its first convolution."""
    recipe = Recipe(native_size, grow=True, global_pool=global_pool, keep=None if keep is None else tuple(keep),
                    classes=classes, skips=tuple(skips), bands=bands)
    return make_net(module, recipe)


__all__ = ["DENSE_KIND", "GROWN_KIND", "AlignedNet", "Certificate", "Classifier", "Conversion", "ConvertError",
           "DenseClassifier", "Recipe", "class_table", "convert_classifier", "grow_segmenter", "load_classifier",
           "make_net", "rebuild", "save_converted"]

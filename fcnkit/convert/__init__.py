"""Turn a trained image classifier into a fully convolutional net, prove the two agree, grow a segmenter.

* :func:`convert_classifier` gives a :class:`Conversion`: the dense net wrapped to give full-resolution score
  maps for images of any size (a :class:`~fcnkit.nets.PaddedNet`), the coarse dense net itself, and the
  :class:`Certificate` of equivalence;
* :func:`grow_segmenter` makes a trainable segmenter of it (FCN-32s/16s/8s, Long et al. 2015).

Either becomes a model (classes, normalisation, a model file) with :meth:`fcnkit.Model.from_conversion`.
"""

from __future__ import annotations

from dataclasses import dataclass

from torch import nn

from fcnkit.convert.dense import (
    Certificate,
    ConvertError,
    DenseClassifier,
    Recipe,
    build_dense,
    certify,
    plan,
    score_map,
)
from fcnkit.convert.grow import DENSE_KIND, GROWN_KIND, make_net, rebuild
from fcnkit.convert.sources import Classifier, default_normalisation, load_classifier
from fcnkit.nets.padded import PaddedNet


@dataclass(frozen=True)
class Conversion:
    """``net``: full-resolution score maps (N×B×H×W → N×C×H×W, any H and W); ``recipe``: how it was made from
    its classifier (what a model file stores to rebuild it); for a converted classifier also ``dense``, the
    coarse map with one score per window, and ``certificate``, the equivalence check and geometry."""

    net: PaddedNet
    recipe: Recipe
    dense: DenseClassifier | None = None
    certificate: Certificate | None = None

    @property
    def kind(self) -> str:
        """The model-file kind of the net."""
        return GROWN_KIND if self.recipe.grow else DENSE_KIND


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
    return Conversion(score_map(p, dense, cert.stride, recipe), recipe, dense, cert)


def grow_segmenter(module: nn.Module, native_size: int, *, classes: int | None = None,
                   keep: tuple[int, ...] | None = None, skips: tuple[int, ...] = (), bands: int | None = None,
                   global_pool: str = "auto") -> Conversion:
    """A segmenter grown from ``module``: its trunk and hidden dense layers (as convolutions), a score
    layer for ``classes`` new classes (zero-initialised) or for the classifier outputs ``keep``, learnable
    bilinear-initialised up-sampling, and 1×1 scores of the trunk stages at ``skips`` (e.g. (16, 8) for
    FCN-8s) fused on the way. ``bands`` above the classifier's widens its first convolution."""
    recipe = Recipe(native_size, grow=True, global_pool=global_pool, keep=None if keep is None else tuple(keep),
                    classes=classes, skips=tuple(skips), bands=bands)
    return Conversion(make_net(module, recipe), recipe)


__all__ = ["DENSE_KIND", "GROWN_KIND", "Certificate", "Classifier", "Conversion", "ConvertError",
           "DenseClassifier", "Recipe", "convert_classifier", "default_normalisation", "grow_segmenter",
           "load_classifier", "make_net", "rebuild"]

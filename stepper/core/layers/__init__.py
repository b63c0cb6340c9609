"""Layers: the interface every layer meets, and Stepper's built-in layers, one module per family.

- :mod:`.base`: :class:`Layer` (what the network needs of any layer, custom ones
  included), :class:`ParamSpec`, :class:`Mode` and :class:`Builtin`, the
  defaults the built-in layers share;
- :mod:`.dense`: the fully connected layer;
- :mod:`.conv`: 1-D and 2-D convolutions; :mod:`.pool`: max and average pooling;
  :mod:`.grid`: the window geometry they share;
- :mod:`.reshape`: flatten; :mod:`.dropout`; :mod:`.norm`: layer and batch norm;
- :mod:`.embedding`: category columns to learned vectors;
- :mod:`.activation`: an activation on its own (after a norm, a pooling, a dropout).
"""

from stepper.core.layers.activation import ActivationLayer
from stepper.core.layers.base import Array, Builtin, Layer, Mode, ParamSpec, Params, is_builtin, shape_text
from stepper.core.layers.conv import Conv, ConvCache
from stepper.core.layers.dense import Dense, DenseCache
from stepper.core.layers.dropout import Dropout
from stepper.core.layers.embedding import Embedding
from stepper.core.layers.grid import Grid, same_padding
from stepper.core.layers.norm import BatchNorm, LayerNorm
from stepper.core.layers.pool import Pool
from stepper.core.layers.reshape import Flatten

__all__ = [
    "ActivationLayer", "Array", "BatchNorm", "Builtin", "Conv", "ConvCache", "Dense", "DenseCache", "Dropout", "Embedding",
    "Flatten", "Grid", "Layer", "LayerNorm", "Mode", "ParamSpec", "Params", "Pool", "is_builtin",
    "same_padding", "shape_text",
]

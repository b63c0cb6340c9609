"""Where each of a model's arrays came from in another program's file.

A model whose weights were read from an ONNX file or a framework's
safetensors file remembers, for every array of Stepper's (``L1.W``), the
tensor it came from (``fc1.weight``), that tensor's shape in the file and how
the axes are arranged there. With it Stepper names each weight both ways
(``L1.W[3,0]`` is ``fc1.weight[0,3]``) and writes the weights back in the
file's own layout.

The arrangement is a permutation of Stepper's axes followed by a reshape::

    file_array = stepper_array.transpose(perm).reshape(shape)

so a PyTorch ``Linear`` weight, stored ``(out, in)`` where Stepper's ``W`` is
``(in, out)``, has ``perm = (1, 0)``; a bias stored ``(1, out)`` has
``perm = (0,)`` and ``shape = (1, out)``.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from stepper.core.network import Block, ParamLayout

Array = NDArray[np.float64]

#: Float types a weights file may hold and Stepper may write, by name.
DTYPES = ("float32", "float64")


@dataclass(frozen=True)
class TensorSource:
    """One tensor of the file that fills one array of Stepper's.

    Attributes:
        tensor: the tensor's name in the file (``fc1.weight``).
        shape: its shape in the file.
        perm: axes of Stepper's array in the file's order (see the module docstring).
    """

    tensor: str
    shape: tuple[int, ...]
    perm: tuple[int, ...]

    def to_file(self, values: Array) -> Array:
        """Stepper's array (its own shape) arranged as the file holds it, C-contiguous."""
        return np.ascontiguousarray(values.transpose(self.perm).reshape(self.shape))

    def from_file(self, values: NDArray[Any], block_shape: tuple[int, ...]) -> NDArray[Any]:
        """The file's array arranged as Stepper's ``block_shape``, C-contiguous."""
        inverse = tuple(int(i) for i in np.argsort(self.perm))
        moved = tuple(block_shape[p] for p in self.perm)
        return np.ascontiguousarray(values.reshape(moved).transpose(inverse))


@dataclass(frozen=True)
class WeightOrigin:
    """The file a model's weights came from, and the tensor behind each array.

    Attributes:
        kind: ``"onnx"`` or ``"safetensors"``.
        file: the file read.
        dtype: the file's float type, ``"float32"`` or ``"float64"``.
        tensors: per array of Stepper's (``"L1.W"``), its source; arrays without
            one (none, today) were not read from the file.
        layout: how the names were found: ``"onnx"``, ``"torch"`` (an
            nn.Sequential state_dict) or ``"names"`` (declared in ``[init.names]``).
        graph: the ONNX file's bytes (an ONNX origin only), the graph that an
            export writes back with the current weights.
        input_transposed: the ONNX graph takes its input features-by-samples
            (Gemm with ``transA = 1`` on the graph input).
        state_tensors: per array a layer keeps besides its weights (an ONNX
            BatchNormalization's ``input_mean`` as ``"L2.running_mean"``), its source.
        inserts: arrays with no tensor in the file (a LayerNormalization
            without ``B``), by name: ``(node index, input position)`` where an
            ONNX export adds the tensor named in ``tensors``.
    """

    kind: str
    file: Path
    dtype: str
    tensors: dict[str, TensorSource]
    layout: str
    graph: bytes | None = field(default=None, repr=False)
    input_transposed: bool = False
    state_tensors: dict[str, TensorSource] = field(default_factory=dict)
    inserts: dict[str, tuple[int, int]] = field(default_factory=dict)

    def source_name(self, layout: ParamLayout, flat: int) -> str | None:
        """``fc1.weight[0,3]`` for the weight at ``flat``, or None if its array has no source."""
        block = layout.block_of(flat)
        source = self.tensors.get(block.prefix)
        if source is None:
            return None
        return f"{source.tensor}[{','.join(str(i) for i in _file_index(block, source, flat))}]"

    def source_names(self, layout: ParamLayout) -> tuple[str | None, ...]:
        """:meth:`source_name` of every parameter, in flat order, ``(n_params,)``."""
        out: list[str | None] = []
        for block in layout.blocks:
            source = self.tensors.get(block.prefix)
            if source is None:
                out.extend([None] * block.size)
                continue
            # Flat positions of the file's tensor, arranged as Stepper's array.
            order = source.from_file(np.arange(block.size).reshape(source.shape), block.shape).ravel()
            for position in order:
                index = np.unravel_index(int(position), source.shape)
                out.append(f"{source.tensor}[{','.join(str(int(i)) for i in index)}]")
        return tuple(out)


def _file_index(block: Block, source: TensorSource, flat: int) -> tuple[int, ...]:
    """Index in the file's tensor of the entry at ``flat`` (inside ``block``)."""
    index = np.unravel_index(flat - block.start, block.shape)
    moved_index = tuple(int(index[p]) for p in source.perm)
    moved_shape = tuple(block.shape[p] for p in source.perm)
    position = int(np.ravel_multi_index(moved_index, moved_shape))
    return tuple(int(i) for i in np.unravel_index(position, source.shape))

"""Finding the weight a mistyped name meant: the nearest names that exist.

Names are ``L2.W[3,0]``: a layer (from 1), an array key and indices (from 0)
(see :mod:`stepper.core.network`). A name that does not exist is usually one of
three slips, and each has its own nearest names:

- the array exists but an index is out of range (``L1.W[9,2]`` when ``L1.W`` is
  4 x 6): the same name with each index brought into range (``L1.W[3,2]``);
- the layer or key is off (``L3.W[0,0]`` in a two-layer model, ``L1.w[0,0]``):
  the same indices in the array of that key in any case, else in the nearest
  layers' arrays of that key, else in the arrays whose names are closest;
- anything else: the names closest as text (difflib's ratio), among at most
  :data:`TEXT_LIMIT` names so that a large model still answers at once.
"""

from __future__ import annotations

import difflib
import re

from stepper.core.network import Block, ParamLayout

#: Most names compared as text when nothing else fits.
TEXT_LIMIT = 5000

_LOOSE = re.compile(r"^\s*[lL]?(\d+)\s*\.\s*(\w+)\s*(?:\[([^\]]*)\]?)?\s*$")


def nearest_names(layout: ParamLayout, text: str, count: int = 3) -> list[str]:
    """Up to ``count`` existing names nearest to ``text``, nearest first; empty when none is close."""
    match = _LOOSE.match(text)
    indices = _indices(match[3] or "") if match else None
    if match and indices is not None:
        layer, key = int(match[1]) - 1, match[2].lower()
        same_key = sorted((b for b in layout.blocks if b.key.lower() == key), key=lambda b: abs(b.layer - layer))
        if same_key:
            # The layer named, in any case of the key; else the same key in the nearest layers.
            here = [b for b in same_key if b.layer == layer]
            return [_clamped(b, indices) for b in (here or same_key[:2])]
        prefixes = {b.prefix: b for b in layout.blocks}
        close = difflib.get_close_matches(f"L{layer + 1}.{match[2]}", list(prefixes), n=count, cutoff=0.5)
        if close:
            return [_clamped(prefixes[p], indices) for p in close]
    names = layout.names if layout.size <= TEXT_LIMIT else [_clamped(b, ()) for b in layout.blocks]
    return difflib.get_close_matches(text.strip(), names, n=count, cutoff=0.6)


def arrays_text(layout: ParamLayout) -> str:
    """``L1.W 4x6, L1.b 6, L2.W 6x1, L2.b 1``: every array and its shape."""
    return ", ".join(f"{b.prefix} {'x'.join(str(s) for s in b.shape)}" for b in layout.blocks)


def unknown_name(layout: ParamLayout, text: str) -> str:
    """The end of a message about a name that does not exist: what was meant, or what exists."""
    near = nearest_names(layout, text)
    if near:
        return f"did you mean {' or '.join(near)}?"
    return f"the model's arrays: {arrays_text(layout)}; a name looks like {layout.names[0]}"


def _indices(text: str) -> tuple[int, ...] | None:
    parts = [p.strip() for p in text.split(",")] if text.strip() else []
    try:
        return tuple(int(p) for p in parts)
    except ValueError:
        return None


def _clamped(block: Block, indices: tuple[int, ...]) -> str:
    """``block``'s entry nearest to ``indices``: each brought into range, missing ones 0, extra ones dropped."""
    fitted = [min(max(indices[d] if d < len(indices) else 0, 0), size - 1) for d, size in enumerate(block.shape)]
    return f"{block.prefix}[{','.join(str(i) for i in fitted)}]"

"""Weight names built from an array and an index, only for the entries asked about.

A name is ``PREFIX[i,j,...]``: the array's prefix (``L2.W``, see
:attr:`stepper.core.network.Block.prefix`) and the entry's position inside the
array, counted from 0. A model of a million weights has a million names;
building them all takes seconds and tens of megabytes, while a report or a
screen shows a few thousand at most. So names are formatted here, a block at
a time, for the flat indices wanted; name patterns are matched array by array
and axis by axis, and the names of an array are spelled out only where a
pattern leaves no other way.

Patterns are shell-style: ``*`` is any run of characters, ``?`` one
character; everything else, brackets included, is literal, so ``L1.W[0,*]``
means row 0 of ``L1.W``.
"""

from __future__ import annotations

import re
from functools import lru_cache
from typing import TYPE_CHECKING, Iterator, Mapping, Sequence, overload

import numpy as np
from numpy.typing import NDArray

if TYPE_CHECKING:
    from stepper.core.network import Block, ParamLayout

IntArray = NDArray[np.int64]

#: Names built at a time when every name is walked through.
CHUNK = 65536


def block_ids(layout: ParamLayout, indices: IntArray) -> IntArray:
    """Position in ``layout.blocks`` of the block holding each flat index, ``(m,)``."""
    starts = np.array([b.start for b in layout.blocks], dtype=np.int64)
    return np.searchsorted(starts, indices, side="right").astype(np.int64) - 1


def _format(template: str, columns: Sequence[IntArray]) -> list[str]:
    """``template % (c0[r], c1[r], ...)`` for every row ``r``, in one formatting call."""
    k = int(columns[0].size) if columns else 0
    if k == 0:
        return []
    values = np.stack(columns, axis=1).ravel().tolist()
    return ("\n".join([template] * k) % tuple(values)).split("\n")


def _block_names(block: Block, local: IntArray, suffix_only: bool = False) -> list[str]:
    """Names of entries ``local`` (offsets inside ``block``); only ``i,j]`` with ``suffix_only``."""
    positions = np.unravel_index(local, block.shape)
    template = ",".join(["%d"] * len(block.shape)) + "]"
    if not suffix_only:
        template = block.prefix.replace("%", "%%") + "[" + template
    return _format(template, [np.asarray(p, dtype=np.int64) for p in positions])


def names_at(layout: ParamLayout, indices: IntArray | Sequence[int]) -> list[str]:
    """The names of flat ``indices`` (any order, repeats allowed), in that order."""
    idx = np.asarray(indices, dtype=np.int64).ravel()
    if idx.size and (idx.min() < 0 or idx.max() >= layout.size):
        raise IndexError(f"flat index out of range 0..{layout.size - 1}")
    out = np.empty(idx.size, dtype=object)
    ids = block_ids(layout, idx)
    for b in np.unique(ids):
        block = layout.blocks[int(b)]
        where = np.flatnonzero(ids == b)
        out[where] = _block_names(block, idx[where] - block.start)
    names: list[str] = out.tolist()
    return names


def name_at(layout: ParamLayout, index: int) -> str:
    """The name of one flat index."""
    return names_at(layout, [index])[0]


@lru_cache(maxsize=64)
def _regex(pattern: str, whole: bool = True) -> re.Pattern[str]:
    """A shell-style pattern (``*``, ``?``; all else literal) as a regular expression."""
    body = "".join(".*" if c == "*" else "." if c == "?" else re.escape(c) for c in pattern)
    return re.compile(body + ("\\Z" if whole else ""), re.DOTALL)


def matches(name: str, pattern: str) -> bool:
    """Whether one name matches a shell-style pattern (see the module docstring)."""
    return _regex(pattern).match(name) is not None


def _match_block(block: Block, pattern: str) -> IntArray:
    """Offsets inside ``block`` of the entries whose names match ``pattern``."""
    everything = np.arange(block.size, dtype=np.int64)
    nothing = np.empty(0, dtype=np.int64)
    if "[" in pattern:
        # A name has exactly one "[": the pattern's first literal "[" must be that one.
        head, tail = pattern.split("[", 1)
        if not matches(block.prefix, head):
            return nothing
        inside = tail[:-1] if tail.endswith("]") and "]" not in tail[:-1] else None
        if inside is not None and inside.strip() == "*":
            return everything
        parts = None if inside is None else inside.split(",")
        if parts is not None and len(parts) == len(block.shape):
            # As many literal commas as the name has: each part matches one axis.
            mask = np.ones((), dtype=bool)
            for part, n in zip(parts, block.shape):
                axis = np.fromiter((matches(str(i), part) for i in range(n)), dtype=bool, count=n)
                mask = np.logical_and.outer(mask, axis)
            return np.flatnonzero(mask.ravel()).astype(np.int64)
        rx = _regex(tail)
        texts = _block_names(block, everything, suffix_only=True)
        return np.fromiter((i for i, t in enumerate(texts) if rx.match(t)), dtype=np.int64)
    # No bracket in the pattern: its wildcards must cover the name's index.
    if pattern.endswith("*") and _regex(pattern[:-1], whole=False).match(block.prefix):
        return everything  # the pattern's start matches within the prefix; "*" takes the rest
    rx = _regex(pattern)
    texts = _block_names(block, everything)
    return np.fromiter((i for i, t in enumerate(texts) if rx.match(t)), dtype=np.int64)


def matching(layout: ParamLayout, pattern: str) -> IntArray:
    """Sorted flat indices of the entries whose names match ``pattern``; empty when none do.

    Names hold no spaces, so spaces in the pattern are ignored (``L1.W[0, 1]``).
    """
    pattern = "".join(pattern.split())
    hits = [block.start + _match_block(block, pattern) for block in layout.blocks]
    return np.concatenate(hits).astype(np.int64) if hits else np.empty(0, dtype=np.int64)


_CANONICAL = re.compile(r"(L\d+\.\w+)\[(\d+(?:,\d+)*)\]", re.ASCII)


class NameIndex(Mapping[str, int]):
    """Flat index of each weight name, read from the name itself (``L2.W[3,0]``).

    Holds the names the layout would spell, exactly (no spaces, no leading
    zeros); looking one up costs the same for any size of model.
    """

    def __init__(self, layout: ParamLayout) -> None:
        self._layout = layout
        self._arrays = {block.prefix: block for block in layout.blocks}

    def __getitem__(self, name: str) -> int:
        match = _CANONICAL.fullmatch(name) if isinstance(name, str) else None
        block = self._arrays.get(match[1]) if match else None
        if match is None or block is None:
            raise KeyError(name)
        parts = match[2].split(",")
        index = tuple(int(p) for p in parts)
        if (len(index) != len(block.shape) or any(str(i) != p for i, p in zip(index, parts))
                or any(i >= n for i, n in zip(index, block.shape))):
            raise KeyError(name)
        return block.start + int(np.ravel_multi_index(index, block.shape))

    def __contains__(self, name: object) -> bool:
        try:
            self[name]  # type: ignore[index]
        except KeyError:
            return False
        return True

    def __iter__(self) -> Iterator[str]:
        return iter(self._layout.names)

    def __len__(self) -> int:
        return self._layout.size


class WeightNames(Sequence[str]):
    """Every weight's name in flat order, ``(n_params,)``, each built when it is asked for.

    Indexing, slicing, ``in`` and ``index`` cost no more for a million
    weights than for ten; walking through all of them builds them a chunk at a
    time. :meth:`of` names many flat indices at once.
    """

    def __init__(self, layout: ParamLayout) -> None:
        self._layout = layout

    def __len__(self) -> int:
        return self._layout.size

    @overload
    def __getitem__(self, index: int) -> str: ...

    @overload
    def __getitem__(self, index: slice) -> list[str]: ...

    def __getitem__(self, index: int | slice) -> str | list[str]:
        if isinstance(index, slice):
            return names_at(self._layout, np.arange(self._layout.size)[index])
        i = int(index)
        if i < 0:
            i += self._layout.size
        if not 0 <= i < self._layout.size:
            raise IndexError(index)
        return name_at(self._layout, i)

    def __iter__(self) -> Iterator[str]:
        for lo in range(0, self._layout.size, CHUNK):
            yield from names_at(self._layout, np.arange(lo, min(lo + CHUNK, self._layout.size)))

    def __contains__(self, name: object) -> bool:
        return name in self._layout.index_of

    def index(self, name: str, start: int = 0, stop: int | None = None) -> int:
        try:
            found = self._layout.index_of[name]
        except KeyError:
            raise ValueError(f"{name!r} is not a weight name") from None
        if found < start or (stop is not None and found >= stop):
            raise ValueError(f"{name!r} is not a weight name in that range")
        return found

    def of(self, indices: IntArray | Sequence[int]) -> list[str]:
        """The names of flat ``indices``, in that order (see :func:`names_at`)."""
        return names_at(self._layout, indices)

    def widest(self) -> int:
        """Length of the longest name: the last entry's of some array (its indices are the largest)."""
        lasts = [block.stop - 1 for block in self._layout.blocks if block.size]
        return max((len(name) for name in names_at(self._layout, lasts)), default=0)

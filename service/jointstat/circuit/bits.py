"""Bits: the values a statistic program computes with, whatever backend runs it.

Theory of operation
-------------------
A program (a statistic, a reference circuit) manipulates arrays of bits. It never sees what a bit *is*: that is
the backend's business (``jointstat.circuit.backend``). A ``Bits`` value is an array with a logical ``shape`` and
two parallel arrays of that shape:

- ``data`` — the backend's payload per bit: a 0/1 ``uint8`` (the plain backend), a 16-byte wire label as one
  ``V16`` cell (the garbler's zero labels, the evaluator's active labels), or nothing at all (``None``: the count
  backend, which only follows shapes);
- ``pub`` — which bits are public constants: ``None`` when no bit is (the common case, and free), otherwise an
  ``int8`` array holding −1 for a secret bit and 0 or 1 for a public one. Both parties run the same program, so
  both know the same bits to be public; the backends use that to fold gates with a constant operand (an AND with 0
  is 0 and costs no ciphertext), which is what keeps the AND counts minimal.

A public bit still carries a valid payload (the plain value, or a label of the public constant wire), so moving
and XORing bits never needs to look at ``pub``.

Words are arrays whose *last* axis holds the bits of a number, least significant first; the leading axes are
lanes (records, table rows). All structural operations are free (no gate) and apply the same numpy operation to
``data`` and ``pub``: indexing and slicing, ``reshape``, ``transpose``/``moveaxis``, ``broadcast_to``, and the
module functions ``concat`` and ``stack``. A ``Bits`` value is never modified in place; operations return new
values, and a label lives exactly as long as some value the program holds refers to it.

``depth`` is an upper bound on the AND depth of any bit of the value (a whole value gets the depth of its deepest
bit): a cheap figure for planning, kept per value rather than per bit.

``buffer`` stands for the payload memory the value keeps alive, the way numpy's views keep their base array alive:
results of gates and inputs get a buffer of their own, views (slices, reshapes, broadcasts) share their parent's,
and copies (``concat``, ``stack``, indexing with arrays) get a new one. A backend's ``Meter`` adds each buffer's
bits when it is made and takes them away when the last value holding it goes, so even the count backend, which
holds no payload at all, knows the most bits a program ever holds at once (its memory per lane, in labels).
"""

from __future__ import annotations

import math
from collections.abc import Iterator, Sequence
from typing import Any

import numpy as np

SECRET = -1  # the ``pub`` entry of a secret bit
PUB_DTYPE = np.dtype(np.int8)

_DUMMY = np.zeros((), dtype=np.bool_)


class Meter:
    """Bits held alive right now, and the most ever (see the module docstring)."""

    def __init__(self) -> None:
        self.live = 0
        self.peak = 0

    def buffer(self, bits: int) -> Buffer:
        return Buffer(self, bits)

    def _add(self, bits: int) -> None:
        self.live += bits
        if self.live > self.peak:
            self.peak = self.live

    def _sub(self, bits: int) -> None:
        self.live -= bits


class Buffer:
    """A token for payload memory of ``bits`` bits, counted by ``meter`` while any value holds it."""

    __slots__ = ("bits", "meter")

    def __init__(self, meter: Meter, bits: int) -> None:
        self.meter = meter
        self.bits = bits
        meter._add(bits)

    def __del__(self) -> None:
        self.meter._sub(self.bits)


def _copies(index: Any) -> bool:
    """Whether numpy indexing with ``index`` copies (advanced indexing) rather than making a view."""
    items = index if isinstance(index, tuple) else (index,)
    return any(not (isinstance(i, int | slice | np.integer) or i is None or i is Ellipsis) for i in items)


def _shape_after(shape: tuple[int, ...], op: Any) -> tuple[int, ...]:
    """The shape ``op`` gives an array of ``shape`` (worked out on a zero-stride stand-in; free for views)."""
    return tuple(op(np.broadcast_to(_DUMMY, shape)).shape)


def _basic_index_shape(shape: tuple[int, ...], index: Any) -> tuple[int, ...] | None:
    """The shape of ``array[index]`` for basic indexing (ints, slices, None, one Ellipsis); None otherwise."""
    items = list(index) if isinstance(index, tuple) else [index]
    if sum(1 for i in items if i is Ellipsis) > 1:
        return None
    consumed = sum(1 for i in items if isinstance(i, int | slice | np.integer) and not isinstance(i, bool))
    if consumed > len(shape) or any(isinstance(i, bool) for i in items):
        return None
    if not any(i is Ellipsis for i in items):
        items.append(Ellipsis)
    out: list[int] = []
    axis = 0
    for item in items:
        if item is Ellipsis:
            take = len(shape) - consumed
            out.extend(shape[axis : axis + take])
            axis += take
        elif item is None:
            out.append(1)
        elif isinstance(item, slice):
            out.append(len(range(*item.indices(shape[axis]))))
            axis += 1
        elif isinstance(item, int | np.integer):
            if not -shape[axis] <= int(item) < shape[axis]:
                return None  # numpy raises the IndexError
            axis += 1
        else:
            return None
    return tuple(out)


class Bits:
    """An immutable array of bits (see the module docstring)."""

    __slots__ = ("buffer", "data", "depth", "pub", "shape")

    def __init__(
        self,
        shape: tuple[int, ...],
        data: np.ndarray | None,
        pub: np.ndarray | None = None,
        depth: int = 0,
        buffer: Buffer | None = None,
    ) -> None:
        self.shape = tuple(int(s) for s in shape)
        self.data = data
        self.pub = pub
        self.depth = depth
        self.buffer = buffer

    # -- numpy-like views -------------------------------------------------------------------------------------
    @property
    def ndim(self) -> int:
        return len(self.shape)

    @property
    def size(self) -> int:
        return math.prod(self.shape)

    def __len__(self) -> int:
        if not self.shape:
            raise TypeError("len() of a single bit")
        return self.shape[0]

    def __iter__(self) -> Iterator[Bits]:
        for i in range(len(self)):
            yield self[i]

    def __repr__(self) -> str:
        public = "no public bits" if self.pub is None else f"{int((self.pub >= 0).sum())} public bits"
        return f"Bits(shape={self.shape}, {public})"

    def _apply(self, op: Any, copies: bool = False) -> Bits:
        data = None if self.data is None else op(self.data)
        pub = None if self.pub is None else op(self.pub)
        if data is not None:
            shape = data.shape
        elif pub is not None:
            shape = pub.shape
        else:
            shape = _shape_after(self.shape, op)
        buffer = self.buffer
        if copies and buffer is not None:
            buffer = buffer.meter.buffer(math.prod(shape))
        return Bits(shape, data, pub, self.depth, buffer)

    def __getitem__(self, index: Any) -> Bits:
        if isinstance(index, Bits):
            raise TypeError("Bits cannot be indexed by secret bits; use the builder's select or mux")
        if self.data is None and self.pub is None:  # shapes only: work the shape out without numpy
            shape = _basic_index_shape(self.shape, index)
            if shape is not None:
                return Bits(shape, None, None, self.depth, self.buffer)
        return self._apply(lambda a: a[index], copies=_copies(index))

    def reshape(self, *shape: int | tuple[int, ...]) -> Bits:
        new = shape[0] if len(shape) == 1 and isinstance(shape[0], tuple) else shape
        return self._apply(lambda a: a.reshape(new))

    def transpose(self, *axes: int) -> Bits:
        return self._apply(lambda a: a.transpose(*axes) if axes else a.transpose())

    def moveaxis(self, source: int, destination: int) -> Bits:
        return self._apply(lambda a: np.moveaxis(a, source, destination))

    def broadcast_to(self, shape: tuple[int, ...]) -> Bits:
        return self._apply(lambda a: np.broadcast_to(a, shape))

    def flip(self, axis: int = 0) -> Bits:
        return self._apply(lambda a: np.flip(a, axis))

    def roll(self, shift: int, axis: int = -1) -> Bits:
        return self._apply(lambda a: np.roll(a, shift, axis), copies=True)

    # -- what is public ---------------------------------------------------------------------------------------
    @property
    def all_secret(self) -> bool:
        return self.pub is None

    def public_mask(self) -> np.ndarray:
        """Boolean array: True where the bit is a public constant."""
        if self.pub is None:
            return np.zeros(self.shape, dtype=np.bool_)
        return self.pub >= 0

    def public_values(self) -> np.ndarray | None:
        """The 0/1 values if every bit is public, else None."""
        if self.pub is None or self.size == 0 or not bool((self.pub >= 0).all()):
            return None if self.size else np.zeros(self.shape, dtype=np.uint8)
        return self.pub.astype(np.uint8)


def _pub_or_secret(b: Bits) -> np.ndarray:
    return b.pub if b.pub is not None else np.broadcast_to(np.int8(SECRET), b.shape)


def _join(parts: Sequence[Bits], op: Any, shape: tuple[int, ...]) -> Bits:
    if not parts:
        raise ValueError("concat/stack of no Bits")
    datas = [p.data for p in parts]
    if any(d is None for d in datas) and not all(d is None for d in datas):
        raise ValueError("concat/stack of Bits from different backends")
    data = None if datas[0] is None else op(datas)
    pub = None
    if any(p.pub is not None for p in parts):
        pub = op([_pub_or_secret(p) for p in parts])
    meter = next((p.buffer.meter for p in parts if p.buffer is not None), None)
    buffer = None if meter is None else meter.buffer(math.prod(shape))
    return Bits(shape, data, pub, max(p.depth for p in parts), buffer)


def concat(parts: Sequence[Bits], axis: int = 0) -> Bits:
    """Join values along an existing axis (free)."""
    parts = list(parts)
    if not parts:
        raise ValueError("concat of no Bits")
    if len(parts) == 1:
        return parts[0]
    shapes = [p.shape for p in parts]
    ndim = len(shapes[0])
    ax = axis % ndim if ndim else 0
    for s in shapes:
        if len(s) != ndim or any(s[i] != shapes[0][i] for i in range(ndim) if i != ax):
            raise ValueError(f"concat: shapes {shapes} do not agree off axis {axis}")
    shape = (*shapes[0][:ax], sum(s[ax] for s in shapes), *shapes[0][ax + 1 :])
    return _join(parts, lambda arrays: np.concatenate(arrays, axis=ax), shape)


def stack(parts: Sequence[Bits], axis: int = 0) -> Bits:
    """Join values of one shape along a new axis (free)."""
    parts = list(parts)
    if not parts:
        raise ValueError("stack of no Bits")
    shapes = {p.shape for p in parts}
    if len(shapes) != 1:
        raise ValueError(f"stack: values of different shapes {sorted(shapes)}")
    base = parts[0].shape
    ax = axis % (len(base) + 1)
    shape = (*base[:ax], len(parts), *base[ax:])
    return _join(parts, lambda arrays: np.stack(arrays, axis=ax), shape)


def broadcast(*values: Bits) -> list[Bits]:
    """The values broadcast to their common shape (numpy's rules; free)."""
    first = values[0].shape
    if all(v.shape == first for v in values):
        return list(values)
    shape = np.broadcast_shapes(*(v.shape for v in values))
    return [v if v.shape == shape else v.broadcast_to(shape) for v in values]

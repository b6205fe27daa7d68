"""Per-reading operators held once per distinct block: a night repeats a few dozen blocks 10^5 times.

A run stores one (n_ports, d, d) block of port operators for every reading, but a night only ever
visits a handful of analyzer settings, so the column is mostly repeats (200,000 readings of a
4x4 joint protocol: 205 MB as a plain array, a few kB as distinct blocks plus a 0.8 MB index).
``SharedOperators`` keeps the distinct blocks and each reading's block number, and hands out plain
arrays for whatever rows are asked for, so code that reads ``operators[lo:hi]`` or
``np.asarray(operators[mask])`` is unchanged while the whole column never sits in memory.
Blocks are compared bit for bit: nothing is rounded or merged.
"""

from __future__ import annotations

from collections.abc import Iterable
from typing import Any

import numpy as np


class SharedOperators:
    """A read-only (n, n_ports, d, d) complex128 column stored as distinct blocks and an index.

    ``blocks`` (k, n_ports, d, d) complex128; ``index`` (n,) int32, the block of each reading.
    Indexing with an int gives one (n_ports, d, d) array; with a slice, mask or index array it gives
    another ``SharedOperators``; ``np.asarray`` gives the full array.
    """

    __array_priority__ = 10.0

    def __init__(self, blocks: np.ndarray, index: np.ndarray) -> None:
        self.blocks = np.asarray(blocks, dtype=np.complex128)
        self.blocks.setflags(write=False)
        self.index = np.asarray(index, dtype=np.int32)
        self.index.setflags(write=False)
        if self.blocks.ndim != 4 or self.index.ndim != 1:
            raise ValueError(f"blocks of shape {self.blocks.shape} / index of shape {self.index.shape}; "
                             "expected (k, n_ports, d, d) and (n,)")

    @classmethod
    def from_chunks(cls, chunks: Iterable[np.ndarray]) -> SharedOperators:
        """Collect (m, n_ports, d, d) chunks read one after another (e.g. from an HDF5 dataset)."""
        seen: dict[bytes, int] = {}
        blocks: list[np.ndarray] = []
        parts: list[np.ndarray] = []
        shape: tuple[int, ...] | None = None
        for chunk in chunks:
            chunk = np.ascontiguousarray(chunk, dtype=np.complex128)
            shape = chunk.shape[1:]
            if len(chunk) == 0:
                continue
            rows = chunk.reshape(len(chunk), -1).view(np.dtype((np.void, chunk[0].nbytes))).ravel()
            distinct, first, inverse = np.unique(rows, return_index=True, return_inverse=True)
            codes = np.empty(len(distinct), dtype=np.int32)
            for j, (key, at) in enumerate(zip(distinct, first)):
                code = seen.get(key.tobytes())
                if code is None:
                    code = seen[key.tobytes()] = len(blocks)
                    blocks.append(chunk[at].copy())
                codes[j] = code
            parts.append(codes[np.asarray(inverse).ravel()])
        if shape is None or len(shape) != 3:
            raise ValueError("operators: no chunk with the shape (m, n_ports, d, d) to learn from")
        stacked = np.stack(blocks) if blocks else np.zeros((0, *shape), np.complex128)
        index = np.concatenate(parts) if parts else np.zeros(0, np.int32)
        return cls(stacked, index)

    @classmethod
    def of(cls, operators: Any) -> SharedOperators:
        """The same column, shared (a plain array is split into chunks of 8192 readings)."""
        if isinstance(operators, SharedOperators):
            return operators
        array = np.asarray(operators, dtype=np.complex128)
        return cls.from_chunks(array[i:i + 8192] for i in range(0, max(len(array), 1), 8192))

    @staticmethod
    def concatenate(parts: Iterable[Any]) -> SharedOperators:
        """Readings of ``parts`` one after another, each part shared or plain."""
        return _joined([SharedOperators.of(p) for p in parts])

    @property
    def shape(self) -> tuple[int, ...]:
        return (len(self.index), *self.blocks.shape[1:])

    @property
    def ndim(self) -> int:
        return 4

    @property
    def dtype(self) -> np.dtype:
        return self.blocks.dtype

    @property
    def nbytes(self) -> int:
        return int(self.blocks.nbytes + self.index.nbytes)

    def __len__(self) -> int:
        return len(self.index)

    def __getitem__(self, key: Any) -> Any:
        if isinstance(key, tuple):
            return np.asarray(self[key[0]])[(slice(None),) * (not np.isscalar(key[0])) + key[1:]]
        if isinstance(key, (int, np.integer)):
            return self.blocks[self.index[key]]
        return SharedOperators(self.blocks, self.index[key])

    def __array__(self, dtype: Any = None, copy: Any = None) -> np.ndarray:
        full = self.blocks[self.index]
        return full if dtype is None else full.astype(dtype, copy=False)

    def __iter__(self) -> Any:
        return (self.blocks[i] for i in self.index)

    def __repr__(self) -> str:
        return f"SharedOperators(shape={self.shape}, distinct={len(self.blocks)})"


def _joined(shared: list[SharedOperators]) -> SharedOperators:
    """Blocks kept distinct across parts: a block seen in an earlier part keeps its number."""
    seen: dict[bytes, int] = {}
    blocks: list[np.ndarray] = []
    parts: list[np.ndarray] = []
    for s in shared:
        remap = np.empty(len(s.blocks), dtype=np.int32)
        for j, block in enumerate(s.blocks):
            key = np.ascontiguousarray(block).tobytes()
            code = seen.get(key)
            if code is None:
                code = seen[key] = len(blocks)
                blocks.append(block)
            remap[j] = code
        parts.append(remap[s.index])
    shape = next((s.blocks.shape[1:] for s in shared), (0, 0, 0))
    stacked = np.stack(blocks) if blocks else np.zeros((0, *shape), np.complex128)
    return SharedOperators(stacked, np.concatenate(parts) if parts else np.zeros(0, np.int32))

"""The per-reading operators column held as distinct blocks gives back exactly the plain array."""

import numpy as np

from lightloom.sequencer.model.shared_operators import SharedOperators


def _column(n: int, rng: np.random.Generator) -> np.ndarray:
    blocks = rng.normal(size=(5, 4, 4, 4)) + 1j * rng.normal(size=(5, 4, 4, 4))
    return blocks[rng.integers(0, 5, size=n)]


def test_chunks_keep_every_bit_and_few_blocks() -> None:
    plain = _column(1000, np.random.default_rng(3))
    plain[7, 0, 0, 0] = -0.0  # a bit pattern of its own stays its own block
    shared = SharedOperators.from_chunks(plain[i:i + 64] for i in range(0, 1000, 64))
    assert shared.shape == plain.shape and len(shared) == 1000
    assert len(shared.blocks) <= 6
    assert np.asarray(shared).tobytes() == plain.tobytes()
    mask = np.arange(1000) % 3 == 0
    np.testing.assert_array_equal(np.asarray(shared[100:200])[mask[100:200]], plain[100:200][mask[100:200]])
    np.testing.assert_array_equal(shared[41], plain[41])
    np.testing.assert_array_equal(shared[5:9, 2], plain[5:9, 2])
    assert shared.nbytes < plain.nbytes / 50


def test_concatenate_of_shared_and_plain_parts() -> None:
    rng = np.random.default_rng(4)
    a, b = _column(300, rng), _column(20, rng)
    joined = SharedOperators.concatenate([SharedOperators.of(a), b])
    np.testing.assert_array_equal(np.asarray(joined), np.concatenate([a, b]))


def test_empty_column_keeps_its_shape() -> None:
    shared = SharedOperators.of(np.zeros((0, 2, 2, 2), np.complex128))
    assert shared.shape == (0, 2, 2, 2) and np.asarray(shared).shape == (0, 2, 2, 2)

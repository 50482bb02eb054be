"""Reproducible random streams for the resampling engines (DEVELOPERS.md: Reproducibility rules).

Contract (part of what a record promises; changing any of it changes every number):

* One root ``numpy.random.SeedSequence`` entropy per plan (the plan's ``seed``).
* Each analysis owns a stream keyed by a stable hash of its id, :func:`analysis_key`, never by
  ``seed + i`` or by run order, so adding or reordering analyses changes no other analysis.
* Resamples are drawn in blocks of :data:`DRAW_BLOCK` rows. Block ``b`` of a stream with key ``k``
  uses ``Generator(PCG64(SeedSequence(entropy=root_seed, spawn_key=k + (b,))))``.
* Resample ``r`` (0-based) is row ``r % DRAW_BLOCK`` of block ``r // DRAW_BLOCK``. Rows of a block are
  drawn in order, each row as ``gen.random(width)`` doubles. A PCG64 double consumes exactly one 64-bit
  output, so drawing rows one at a time, in runs, or starting mid-block after
  ``bit_generator.advance(offset * width)`` gives the same numbers. Memory batches and workers may
  therefore split blocks anywhere.

Streams are only promised identical on the same numpy build (numpy's own policy); the record
stores the versions.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass

import numpy as np

DRAW_BLOCK: int = 1000
GENERATOR = "PCG64"

__all__ = ["DRAW_BLOCK", "GENERATOR", "REFERENCE_DRAWS_SHA256", "Stream", "UniformRows", "analysis_key",
           "draws_sha256", "stream_for"]


def analysis_key(analysis_id: str) -> int:
    """Stable 64-bit key of an analysis id: first 8 bytes of SHA-256 of its UTF-8 text, big-endian."""
    return int.from_bytes(hashlib.sha256(analysis_id.encode("utf-8")).digest()[:8], "big")


@dataclass(frozen=True)
class Stream:
    """A node of the plan's seed tree: the root entropy and a spawn key path below it."""

    root_seed: int
    key: tuple[int, ...]

    def __post_init__(self) -> None:
        # SeedSequence accepts only non-negative integers; fail here with a readable message
        if not isinstance(self.root_seed, int) or self.root_seed < 0:
            raise ValueError(f"root_seed must be a non-negative integer, got {self.root_seed!r}")
        if any(not isinstance(k, int) or k < 0 for k in self.key):
            raise ValueError(f"spawn key parts must be non-negative integers, got {self.key!r}")

    def generator(self, block_index: int) -> np.random.Generator:
        """The generator of draw block ``block_index`` (its own child stream)."""
        if block_index < 0:
            raise ValueError(f"block_index must be >= 0, got {block_index}")
        seq = np.random.SeedSequence(entropy=self.root_seed, spawn_key=self.key + (block_index,))
        return np.random.Generator(np.random.PCG64(seq))

    def child(self, label: int) -> Stream:
        """A sub-stream (``key + (label,)``), e.g. one per engine step that needs its own draws."""
        return Stream(self.root_seed, self.key + (label,))

    def describe(self) -> dict:
        """What the record stores so that anyone can rebuild the stream."""
        return {
            "root_seed": self.root_seed,
            "spawn_key": list(self.key),
            "generator": GENERATOR,
            "draw_block": DRAW_BLOCK,
        }


def stream_for(root_seed: int, analysis_id: str) -> Stream:
    """The stream of one analysis: key ``(analysis_key(analysis_id),)`` below the root seed."""
    return Stream(root_seed, (analysis_key(analysis_id),))


class UniformRows:
    """Reads the uniform rows of a stream in resample order, crossing draw blocks as needed.

    ``take(rows)`` returns the next ``rows`` rows, shape ``(rows, width)``, of U[0, 1) doubles.
    The numbers depend only on the resample index, never on how the rows are split into takes.
    """

    def __init__(self, stream: Stream, width: int, start: int = 0):
        if width < 1:
            raise ValueError(f"width must be >= 1, got {width}")
        if start < 0:
            raise ValueError(f"start must be >= 0, got {start}")
        self._stream = stream
        self._width = width
        self._next_row = start
        self._block = -1
        self._gen: np.random.Generator | None = None

    @property
    def next_row(self) -> int:
        """Index of the resample the next ``take`` begins with."""
        return self._next_row

    def take(self, rows: int, out: np.ndarray | None = None) -> np.ndarray:
        """The next ``rows`` rows, written into ``out`` (shape (rows, width), float64) when given."""
        if out is None:
            out = np.empty((rows, self._width), dtype=np.float64)
        elif out.shape != (rows, self._width) or out.dtype != np.float64:
            raise ValueError(f"out must be a float64 array of shape {(rows, self._width)}")
        filled = 0
        while filled < rows:
            block, offset = divmod(self._next_row, DRAW_BLOCK)
            if block != self._block or self._gen is None:
                self._gen = self._stream.generator(block)
                self._block = block
                if offset:
                    # starting mid-block (a worker's share): one 64-bit step per double
                    # PCG64 has advance(); numpy's stubs declare only the BitGenerator base
                    self._gen.bit_generator.advance(offset * self._width)  # type: ignore[attr-defined]
            count = min(rows - filled, DRAW_BLOCK - offset)
            self._gen.random(out=out[filled:filled + count])
            filled += count
            self._next_row += count
        return out


# SHA-256 of the draws `draws_sha256` makes, as numpy 1.26.4 and 2.4.6 both make them: numpy keeps
# SeedSequence, PCG64 and the doubles and 64-bit words drawn from it the same across its versions and
# platforms, and an installation that draws these numbers draws every resample of every record the same.
REFERENCE_DRAWS_SHA256 = "8091a50fb215b482e638660780da3959fd4f42deaadba441287b4bc441c12187"


def draws_sha256() -> str:
    """SHA-256 of a few draws made exactly as the engines make theirs: doubles of uniform rows
    crossing a block boundary from a start inside a block (a worker's share), and full-range 64-bit
    words after an advance (the sign-flip tests). Equal to `REFERENCE_DRAWS_SHA256` when this
    installation's random numbers are the reference ones."""
    stream = Stream(20261201, (analysis_key("reference draws"),))
    digest = hashlib.sha256()
    digest.update(UniformRows(stream, 3, DRAW_BLOCK - 2).take(4).astype("<f8").tobytes())
    gen = stream.generator(1)
    gen.bit_generator.advance(5)  # type: ignore[attr-defined]  # PCG64 has advance()
    digest.update(gen.integers(0, 2**64, size=6, dtype=np.uint64, endpoint=False).astype("<u8").tobytes())
    return digest.hexdigest()

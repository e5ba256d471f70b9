"""Perceptual hashes of patch crops and the Hamming search that finds near-duplicates.

A crop's hash is the 64-bit DCT perceptual hash (pHash) of the ImageHash library:
the grey crop resized to 32 x 32, its 2-D DCT-II, and one bit per coefficient of the
top-left 8 x 8 block, set when the coefficient is above the block's median. Two crops
whose hashes differ in few bits look alike at a coarse scale: the same surface cut a
pixel or two apart, or the same crop saved again as JPEG. Hashes are packed into
``uint64`` (bit 63 is the block's top-left coefficient, row-major) so that a search
over all pairs is one XOR and one popcount per pair, vectorised with numpy.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np

from trainkit.core.cores import usable_cores

__all__ = [
    "DEFAULT_MAX_DISTANCE",
    "HASH_BITS",
    "HASH_NAME",
    "array_hash",
    "crop_hash",
    "hamming_distances",
    "hash_arrays",
    "hash_files",
    "members_to_drop",
    "near_pairs",
]

HASH_BITS = 64
HASH_NAME = "pHash 64-bit (ImageHash)"
#: Largest Hamming distance, in bits of 64, at which two crops count as near-duplicates:
#: 6 bits catch the same tile shifted by a pixel or two and JPEG re-encodes, below the
#: closest unrelated tiles (benchmarks/results/lab_notes.md; the cases kept as tests are in
#: tests/test_neardup.py). A pHash distance is even (each hash has 32 of its 64 bits set,
#: barring ties), so 6 and 7 behave alike. Flat crops (blank, clipped) hash alike and are
#: reported as pairs.
DEFAULT_MAX_DISTANCE = 6
#: Pairs compared per block of the Hamming search (bounds the memory to a few tens of MB).
_BLOCK_PAIRS = 1 << 22
#: Set bits of every byte value, for numpy builds without ``np.bitwise_count`` (< 2.0).
_POPCOUNT8 = np.array([bin(i).count("1") for i in range(256)], dtype=np.uint8)


def crop_hash(path: str | Path) -> int:
    """The 64-bit pHash of an image file as an unsigned int (bit 63 = first coefficient)."""
    from PIL import Image

    with Image.open(path) as im:
        return _phash(im)


def array_hash(rgb: np.ndarray) -> int:
    """:func:`crop_hash` of a crop held as an (S, S, 3) uint8 RGB array."""
    from PIL import Image

    return _phash(Image.fromarray(np.ascontiguousarray(rgb)))


def _phash(im) -> int:
    import imagehash

    bits = imagehash.phash(im, hash_size=8).hash
    return int.from_bytes(np.packbits(bits.ravel()).tobytes(), "big")


def hash_arrays(images: np.ndarray) -> np.ndarray:
    """:func:`array_hash` of each crop of an (N, S, S, 3) uint8 array, as uint64."""
    return np.array([array_hash(a) for a in images], dtype=np.uint64)


def hash_files(
    paths: Sequence[str | Path],
    *,
    workers: int | None = None,
    progress: Callable[[int, int], None] | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Hash image files in a thread pool (decoding and resizing release the GIL).

    Args:
        paths: image files.
        workers: threads; None uses up to 8, one per core.
        progress: called as ``progress(done, total)`` after each file.

    Returns:
        ``(hashes, ok)``: uint64 hashes in the order of ``paths`` and a boolean mask
        that is False where a file is missing or cannot be decoded (its hash is 0).
    """

    def one(path: str | Path) -> int | None:
        try:
            return crop_hash(path)
        except (OSError, ValueError):  # missing, truncated or not an image
            return None

    n = len(paths)
    hashes = np.zeros(n, dtype=np.uint64)
    ok = np.zeros(n, dtype=bool)
    workers = workers or min(8, usable_cores())
    with ThreadPoolExecutor(max_workers=workers) as pool:
        for i, h in enumerate(pool.map(one, paths)):
            if h is not None:
                hashes[i], ok[i] = h, True
            if progress is not None:
                progress(i + 1, n)
    return hashes, ok


def _popcount(x: np.ndarray) -> np.ndarray:
    """Set bits of each uint64, as uint8."""
    if hasattr(np, "bitwise_count"):
        return np.bitwise_count(x).astype(np.uint8, copy=False)
    return _POPCOUNT8[x.view(np.uint8)].reshape(*x.shape, 8).sum(axis=-1, dtype=np.uint8)


def hamming_distances(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """All Hamming distances between uint64 hashes: shape (len(a), len(b)), uint8."""
    a = np.asarray(a, dtype=np.uint64)
    b = np.asarray(b, dtype=np.uint64)
    if a.ndim != 1 or b.ndim != 1:
        raise ValueError(f"expected 1-D arrays of hashes, got shapes {a.shape} and {b.shape}")
    return _popcount(a[:, None] ^ b[None, :])


def near_pairs(
    a: np.ndarray, b: np.ndarray, *, max_distance: int = DEFAULT_MAX_DISTANCE
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Pairs (i, j) with ``hamming(a[i], b[j]) <= max_distance``, searched in row blocks.

    Returns:
        ``(i, j, distance)`` as int arrays, ordered by i then j.
    """
    if not 0 <= max_distance <= HASH_BITS:
        raise ValueError(f"max_distance must be in 0..{HASH_BITS} bits, got {max_distance}")
    a = np.asarray(a, dtype=np.uint64)
    b = np.asarray(b, dtype=np.uint64)
    rows = max(1, _BLOCK_PAIRS // max(1, len(b)))
    found_i, found_j, found_d = [], [], []
    for start in range(0, len(a), rows):
        d = hamming_distances(a[start : start + rows], b)
        i, j = np.nonzero(d <= max_distance)
        found_i.append(i + start)
        found_j.append(j)
        found_d.append(d[i, j].astype(np.int64))
    if not found_i:
        empty = np.zeros(0, dtype=np.int64)
        return empty, empty.copy(), empty.copy()
    return (
        np.concatenate(found_i).astype(np.int64),
        np.concatenate(found_j).astype(np.int64),
        np.concatenate(found_d),
    )


def members_to_drop(
    pairs: Sequence[tuple[int, str, int, str]], order: Sequence[str] = ("train", "val", "test")
) -> dict[int, str]:
    """Which member of each cross-subset pair to take out: patch id -> its subset.

    The member in the later subset of ``order`` goes (train keeps its patches; a val-test
    pair loses its test member). Pairs with train are settled first, so a val patch
    dropped for resembling a training patch also settles its pairs with test patches.

    Args:
        pairs: ``(id_a, subset_a, id_b, subset_b)`` with ``subset_a != subset_b``.
        order: subsets from the one that keeps its members to the one that gives first.
    """
    rank = {s: k for k, s in enumerate(order)}
    for ida, sa, idb, sb in pairs:
        if sa not in rank or sb not in rank or sa == sb:
            raise ValueError(
                f"expected a pair from two of {', '.join(order)}, got patch {ida} in {sa!r} "
                f"and patch {idb} in {sb!r}"
            )
    dropped: dict[int, str] = {}
    for ida, sa, idb, sb in sorted(pairs, key=lambda p: min(rank[p[1]], rank[p[3]])):
        if ida in dropped or idb in dropped:
            continue
        pid, subset = (idb, sb) if rank[sb] > rank[sa] else (ida, sa)
        dropped[pid] = subset
    return dropped

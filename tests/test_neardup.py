"""Perceptual hashes and the Hamming search: checked against the published pHash recipe,
scipy's Hamming distance and ImageHash's own distance; near-duplicates found, unrelated
crops left alone."""

from __future__ import annotations

import io

import imagehash
import numpy as np
import pytest
from PIL import Image
from scipy.fft import dctn
from scipy.spatial.distance import cdist

from trainkit.labels import neardup
from trainkit.labels.neardup import (
    DEFAULT_MAX_DISTANCE,
    crop_hash,
    hamming_distances,
    hash_files,
    members_to_drop,
    near_pairs,
)
from trainkit.synth import SynthOptions, generate_photo

TILE = 128


def _png(a: np.ndarray) -> io.BytesIO:
    buf = io.BytesIO()
    Image.fromarray(a).save(buf, format="PNG")
    buf.seek(0)
    return buf


def _jpeg_copy(a: np.ndarray, quality: int = 75) -> np.ndarray:
    buf = io.BytesIO()
    Image.fromarray(a).save(buf, format="JPEG", quality=quality)
    buf.seek(0)
    with Image.open(buf) as im:
        return np.asarray(im.convert("RGB"))


def _bits(h: int) -> np.ndarray:
    return np.unpackbits(np.frombuffer(int(h).to_bytes(8, "big"), dtype=np.uint8)).astype(bool)


@pytest.fixture(scope="module")
def photos() -> list[np.ndarray]:
    """Six small synthetic concrete photos of different seeds."""
    return [generate_photo(s, SynthOptions(height=256, width=384)).image for s in range(6)]


def test_hash_bits_follow_the_published_phash_recipe(photos):
    """pHash as described in N. Krawetz, "Looks Like It" (hackerfactor.com, 2011), the
    recipe ImageHash cites: grey, 32 x 32, 2-D DCT-II, top-left 8 x 8 block, one bit per
    coefficient above the block's median. Recomputed here with scipy.fft.dctn."""
    rng = np.random.default_rng(1)
    crops = [p[:TILE, :TILE] for p in photos[:3]]
    crops.append(rng.integers(0, 256, (TILE, TILE, 3), dtype=np.uint8))
    for a in crops:
        grey = Image.fromarray(a).convert("L").resize((32, 32), Image.Resampling.LANCZOS)
        block = dctn(np.asarray(grey, dtype=np.float64), type=2)[:8, :8]
        expected = (block > np.median(block)).ravel()
        got = _bits(crop_hash(_png(a)))
        np.testing.assert_array_equal(got, expected)
        assert got.sum() == 32  # half the bits: why pHash distances are always even


def test_hamming_distances_match_scipy_and_imagehash(photos, monkeypatch):
    rng = np.random.default_rng(7)
    a = rng.integers(0, 2**64, 40, dtype=np.uint64, endpoint=False)
    b = rng.integers(0, 2**64, 30, dtype=np.uint64, endpoint=False)
    bits_a = np.array([_bits(int(x)) for x in a])
    bits_b = np.array([_bits(int(x)) for x in b])
    # scipy's "hamming" is the fraction of differing components.
    reference = np.rint(cdist(bits_a, bits_b, metric="hamming") * 64).astype(int)
    np.testing.assert_array_equal(hamming_distances(a, b), reference)
    # The byte-table path used on numpy < 2.0 gives the same answer.
    monkeypatch.delattr(np, "bitwise_count", raising=False)
    np.testing.assert_array_equal(hamming_distances(a, b), reference)
    monkeypatch.undo()
    # ImageHash's own distance (ImageHash.__sub__) on real crops.
    crops = [p[:TILE, :TILE] for p in photos]
    ours = np.array([crop_hash(_png(c)) for c in crops], dtype=np.uint64)
    theirs = [imagehash.phash(Image.fromarray(c)) for c in crops]
    d = hamming_distances(ours, ours)
    for i in range(len(crops)):
        for j in range(len(crops)):
            assert d[i, j] == theirs[i] - theirs[j]


def test_near_pairs_in_blocks_equal_the_full_search(monkeypatch):
    rng = np.random.default_rng(3)
    base = rng.integers(0, 2**64, 50, dtype=np.uint64, endpoint=False)
    flips = np.uint64(1) << rng.integers(0, 64, (50, 3)).astype(np.uint64)
    other = np.concatenate([base[:20] ^ flips[:20, 0] ^ flips[:20, 1], base[20:]])
    b = rng.permutation(np.concatenate([other, rng.integers(0, 2**64, 30, dtype=np.uint64)]))
    brute = {
        (i, j, (int(x) ^ int(y)).bit_count())  # Python's own popcount
        for i, x in enumerate(base)
        for j, y in enumerate(b)
        if (int(x) ^ int(y)).bit_count() <= 4
    }
    monkeypatch.setattr(neardup, "_BLOCK_PAIRS", 7 * len(b))  # 7 rows per block
    i, j, d = near_pairs(base, b, max_distance=4)
    assert set(zip(i.tolist(), j.tolist(), d.tolist(), strict=True)) == brute
    assert len(brute) >= 50  # the planted copies are there
    with pytest.raises(ValueError, match="max_distance must be in 0..64 bits, got 65"):
        near_pairs(base, b, max_distance=65)


def test_shifted_tiles_and_jpeg_copies_are_near_duplicates(photos):
    # 224 px is the kit's default tile; at 128 px about 1 % of 1-px shifts land at 8 bits
    # (measured on synthetic concrete, see DEFAULT_MAX_DISTANCE).
    y, x, t = 10, 60, 224
    for im in photos:
        tile = im[y : y + t, x : x + t]
        small = im[y : y + TILE, x : x + TILE]
        pairs = [
            (tile, im[y : y + t, x + 1 : x + 1 + t]),  # the grid one pixel to the right
            (tile, im[y + 1 : y + 1 + t, x : x + t]),  # one pixel down
            (tile, _jpeg_copy(tile, quality=75)),  # saved again as JPEG
            (small, _jpeg_copy(small, quality=75)),  # a 128-px tile saved again as JPEG
        ]
        for original, copy in pairs:
            d = (crop_hash(_png(original)) ^ crop_hash(_png(copy))).bit_count()
            assert d <= DEFAULT_MAX_DISTANCE


def test_unrelated_crops_are_not_near_duplicates(photos):
    rng = np.random.default_rng(11)
    crops = [p[y : y + TILE, x : x + TILE] for p in photos for y, x in ((0, 0), (128, 256))]
    crops += [rng.integers(0, 256, (TILE, TILE, 3), dtype=np.uint8) for _ in range(4)]
    hashes = np.array([crop_hash(_png(c)) for c in crops], dtype=np.uint64)
    d = hamming_distances(hashes, hashes)
    off_diagonal = d[~np.eye(len(crops), dtype=bool)]
    assert off_diagonal.min() > DEFAULT_MAX_DISTANCE


def test_hash_files_marks_unreadable_files(tmp_path, photos):
    good = tmp_path / "good.png"
    Image.fromarray(photos[0][:TILE, :TILE]).save(good)
    bad = tmp_path / "bad.png"
    bad.write_text("not an image")
    seen = []
    hashes, ok = hash_files(
        [good, tmp_path / "missing.png", bad], progress=lambda d, t: seen.append((d, t))
    )
    assert ok.tolist() == [True, False, False]
    assert int(hashes[0]) == crop_hash(good) and seen[-1] == (3, 3)


def test_members_to_drop_keeps_train_and_settles_train_pairs_first():
    pairs = [
        (1, "train", 2, "val"),  # the val patch goes
        (2, "val", 3, "test"),  # already settled by dropping 2
        (4, "val", 5, "test"),  # the test patch goes
        (6, "test", 7, "train"),  # the test patch goes, whichever side it is on
    ]
    assert members_to_drop(pairs) == {2: "val", 5: "test", 6: "test"}
    with pytest.raises(ValueError, match="expected a pair from two of train, val, test"):
        members_to_drop([(1, "train", 2, "train")])

"""Crash-safe writes: the old file survives a failed write; no temporary files are left."""

from __future__ import annotations

import pytest

from trainkit.core.fsutil import atomic_path, atomic_write_text


def test_replace_on_success_and_keep_old_on_failure(tmp_path):
    target = tmp_path / "metrics.json"
    atomic_write_text(target, "old")
    with pytest.raises(RuntimeError):
        with atomic_path(target) as tmp:
            tmp.write_text("half-writ")
            raise RuntimeError("killed mid-write")
    assert target.read_text() == "old"
    atomic_write_text(target, "new")
    assert target.read_text() == "new"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["metrics.json"]


def test_temporary_name_keeps_the_suffix(tmp_path):
    from PIL import Image

    with atomic_path(tmp_path / "plot.png") as tmp:
        assert tmp.suffix == ".png" and tmp.parent == tmp_path
        Image.new("RGB", (2, 2)).save(tmp)  # Pillow picks the format from the suffix
    assert Image.open(tmp_path / "plot.png").format == "PNG"


def test_two_writers_of_one_file_never_share_a_temporary_file(tmp_path):
    # Two writes of the same target at once (threads here; processes alike) must each get
    # their own temporary file: a fixed or per-process name would let one writer truncate,
    # replace or delete the other's half-written file.
    target = tmp_path / "metrics.json"
    with atomic_path(target) as first, atomic_path(target) as second:
        assert first != second and first.parent == second.parent == tmp_path
        first.write_text("one")
        second.write_text("two")
    assert target.read_text() == "one"  # the outer write finished last and won, whole
    assert sorted(p.name for p in tmp_path.iterdir()) == ["metrics.json"]


def test_written_files_get_the_usual_permissions(tmp_path):
    # Outputs are read by other people and tools: the atomic write must not leave them
    # private (as a file made by tempfile.mkstemp would be, mode 0600).
    import os

    atomic_write_text(tmp_path / "a.txt", "x")
    (tmp_path / "b.txt").write_text("x")  # a plain write, for the umask in force
    assert os.stat(tmp_path / "a.txt").st_mode == os.stat(tmp_path / "b.txt").st_mode


def test_atomic_write_json_writes_nan_and_infinity_as_null(tmp_path):
    """RFC 8259 section 6 has no NaN or Infinity; the stdlib json writes them by default
    (``json.dumps(float('nan')) == 'NaN'``), so the kit's one JSON writer maps them to null."""
    import json

    import numpy as np

    from trainkit.core.fsutil import atomic_write_json

    p = tmp_path / "x.json"
    atomic_write_json(p, {"a": float("nan"), "b": [np.float32(np.inf), 1.5], "c": np.int64(3)})
    text = p.read_text(encoding="utf-8")
    assert "NaN" not in text and "Infinity" not in text
    assert json.loads(text) == {"a": None, "b": [None, 1.5], "c": 3}


def test_file_sha256_reads_in_blocks_and_equals_hashlib_on_the_whole_bytes(tmp_path):
    """A file of 2.5 MiB crosses the 1 MiB blocks; the digest must equal hashlib's of the
    whole content at once, and the empty file's is the published SHA-256 of no input
    (FIPS 180-4 test vector e3b0c442...b855)."""
    import hashlib

    from trainkit.core.fsutil import file_sha256

    data = bytes(range(256)) * (10 * 1024 + 3)
    (tmp_path / "a.bin").write_bytes(data)
    assert file_sha256(tmp_path / "a.bin") == hashlib.sha256(data).hexdigest()
    (tmp_path / "e.bin").write_bytes(b"")
    assert file_sha256(tmp_path / "e.bin") == (
        "e3b0c44298fc1c149afbf4c8996fb92427ae41e4649b934ca495991b7852b855"
    )

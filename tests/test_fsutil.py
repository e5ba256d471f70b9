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

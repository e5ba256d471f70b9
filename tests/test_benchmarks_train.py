"""The reference side of the training benchmark: its dataset export and history reading."""

from __future__ import annotations

from collections import Counter
from pathlib import Path

import numpy as np
import pytest
from conftest import benchmark_module
from PIL import Image
from torchvision.datasets import ImageFolder


@pytest.fixture(scope="module")
def tb():
    with benchmark_module("train_bench") as module:
        yield module


def test_export_gives_imagefolder_one_folder_per_class_with_the_workspace_counts(tb, tmp_path):
    ws = tb.build_workspace(tmp_path, n_photos=10, tile_px=64)
    counts = tb.export_image_folders(ws, tmp_path / "ref")
    records = [r for r in ws.patches() if r.label is not None]
    from trainkit.store.pixels import PatchPixels

    crops = dict(zip((r.id for r in records), PatchPixels(ws).get(records), strict=True))
    for subset in ("train", "test"):
        expected = Counter(r.label for r in records if r.subset == subset)
        assert expected, f"the split left {subset} empty; the check below would prove nothing"
        assert counts[subset] == dict(expected)
        ds = ImageFolder(tmp_path / "ref" / subset)
        # torchvision numbers the class folders in sorted order
        assert ds.class_to_idx == {name: i for i, name in enumerate(sorted(expected))}
        assert Counter(ds.classes[t] for t in ds.targets) == expected
        for path, _ in ds.samples:  # lossless: the reference sees the kit's pixels
            with Image.open(path) as exported:
                np.testing.assert_array_equal(np.asarray(exported), crops[int(Path(path).stem)])
    assert not (tmp_path / "ref" / "val").exists()  # only the subsets asked for


@pytest.mark.parametrize("column", ["train_images_per_s", "images_per_second"])
def test_read_history_takes_either_throughput_column(tb, tmp_path, column):
    (tmp_path / "history.csv").write_text(
        f"epoch,lr,{column},seconds\n1,0.001,12.5,4\n2,0.002,14,3.5\n", encoding="utf-8"
    )
    rows = tb.read_history(tmp_path)
    assert [r["images_per_s"] for r in rows] == [12.5, 14.0]
    assert [r["stage"] for r in rows] == ["full", "full"]  # no stage column: all full


def test_read_history_names_the_expected_columns_when_none_is_there(tb, tmp_path):
    (tmp_path / "history.csv").write_text("epoch,lr\n1,0.001\n", encoding="utf-8")
    with pytest.raises(ValueError, match="train_images_per_s, images_per_second"):
        tb.read_history(tmp_path)

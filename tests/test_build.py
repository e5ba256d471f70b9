"""Tests for trainkit.labels.build: photos to a labelled, split workspace in one call."""

from __future__ import annotations

import pytest

from trainkit.core.decode import list_images
from trainkit.core.taxonomy import load_class_set
from trainkit.intake.sidecar import read_sidecar
from trainkit.intake.tiling import tile_into_workspace
from trainkit.labels.build import BuildProgress, build_workspace
from trainkit.labels.labels_io import import_csv
from trainkit.labels.splits import split_workspace
from trainkit.store.workspace import Workspace
from trainkit.synth import SynthOptions, write_dataset

SPLIT = {"test_fraction": 0.2, "val_fraction": 0.15, "seed": 0}


@pytest.fixture(scope="module")
def synth_data(tmp_path_factory):
    data = tmp_path_factory.mktemp("synth")
    write_dataset(
        data,
        n_photos=12,
        seed=11,
        tile_px=32,
        options=SynthOptions(height=96, width=128),
        class_set=load_class_set("presence"),
    )
    return data


def _table(ws: Workspace) -> list[tuple]:
    return [(r.id, r.photo, tuple(r.box), r.group, r.label, r.subset) for r in ws.patches()]


def test_one_call_equals_tiling_labels_and_split_by_hand(tmp_path, synth_data):
    # The reference is the sequence the demo and the benchmarks wrote out before: tile,
    # import the labels, split. The one call must give the same patches, labels and split.
    cs = load_class_set("presence")
    photos = list_images([synth_data / "photos"])
    sidecar = read_sidecar(synth_data / "scale.csv")
    by_hand = Workspace.create(tmp_path / "by-hand", class_set=cs, tile_px=32)
    tile_into_workspace(photos, by_hand, sidecar=sidecar, group_by="photo")
    import_csv(by_hand, synth_data / "labels.csv", reviewer="truth")
    hand_split = split_workspace(by_hand, **SPLIT)

    events = []

    class Recorder(BuildProgress):
        def stage(self, name, total):
            events.append(("stage", name, total))

        def stage_done(self, name, result):
            events.append(("done", name))

    built = build_workspace(
        photos,
        tmp_path / "built",
        class_set=cs,
        tile_px=32,
        sidecar=sidecar,
        labels_csv=synth_data / "labels.csv",
        reviewer="truth",
        split=SPLIT,
        progress=Recorder(),
    )
    assert _table(built.workspace) == _table(by_hand)
    assert any(r[4] is not None for r in _table(by_hand))  # labels reached the patches
    assert built.split == hand_split
    assert built.tiled["photos_added"] == len(photos)
    assert events == [
        ("stage", "tile", len(photos)),
        ("done", "tile"),
        ("stage", "labels", None),
        ("done", "labels"),
        ("stage", "split", None),
        ("done", "split"),
    ]

    # A second run resumes: nothing tiled twice, labels not imported again, same split.
    again = build_workspace(
        photos,
        tmp_path / "built",
        class_set=cs,
        tile_px=32,
        sidecar=sidecar,
        labels_csv=synth_data / "labels.csv",
        reviewer="truth",
        split=SPLIT,
    )
    assert again.tiled["photos_added"] == 0 and again.imported == []
    assert _table(again.workspace) == _table(by_hand)
    assert len(again.workspace.label_events()) == len(by_hand.label_events())

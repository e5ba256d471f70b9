"""Label import and export: CSV and folder-per-class round trips, all-or-nothing imports."""

from __future__ import annotations

import csv
import shutil

import numpy as np
import pytest
from PIL import Image

from trainkit.core.taxonomy import load_class_set
from trainkit.labels.labels_io import (
    LabelsIOError,
    export_csv,
    export_folders,
    folder_file_name,
    import_csv,
    import_folders,
)
from trainkit.labels.workspace import Workspace


def make_ws(root, n_photos=2, per_photo=3, size=32):
    """A workspace with real (random-pixel) PNG crops, one photo name inside a subfolder."""
    ws = Workspace.create(root, class_set=load_class_set("orientation"), tile_px=size)
    rng = np.random.default_rng(0)
    for i in range(n_photos):
        name = f"site{i}/p{i}.jpg" if i else f"p{i}.jpg"
        patches = []
        for c in range(per_photo):
            rel = f"patches/{i}/r000_c{c:03d}.png"
            (ws.root / rel).parent.mkdir(parents=True, exist_ok=True)
            Image.fromarray(rng.integers(0, 255, (size, size, 3), dtype=np.uint8)).save(
                ws.root / rel
            )
            patches.append(
                dict(row=0, col=c, x0=size * c, y0=0, x1=size * c + size, y1=size, crop=rel)
                | dict(patch_mm=None, focus=1.0, clipped=0.0)
            )
        ws.add_photo_with_patches(
            name=name,
            source_path=f"/x/{name}",
            width=size * per_photo,
            height=size,
            gsd_mm=None,
            group_id=f"g{i}",
            sha256=f"{i:064d}",
            patches=patches,
        )
    return ws


def current(ws):
    return {(r.photo, r.box): (r.labelled, r.label) for r in ws.patches()}


def test_csv_export_reads_back_into_a_fresh_workspace(tmp_path):
    ws = make_ws(tmp_path / "a")
    ids = [r.id for r in ws.patches()]
    ws.add_labels([(ids[0], "vertical"), (ids[1], None), (ids[4], "map")], reviewer="ana")
    ws.add_labels([(ids[0], "none")], reviewer="ben")  # newer: the current label
    assert export_csv(ws, tmp_path / "labels.csv") == 3
    rows = list(csv.DictReader((tmp_path / "labels.csv").open()))
    assert [(r["label"], r["reviewer"]) for r in rows] == [
        ("none", "ben"),
        ("", "ana"),
        ("map", "ana"),
    ]
    fresh = make_ws(tmp_path / "b")
    assert import_csv(fresh, tmp_path / "labels.csv", reviewer="copy") == 3
    assert current(fresh) == current(ws)
    assert {e["origin"] for e in fresh.label_events()} == {"file"}


def test_csv_by_patch_id(tmp_path):
    ws = make_ws(tmp_path / "a")
    p = tmp_path / "ids.csv"
    p.write_text("patch_id,label\n1,horizontal\n2,\n")
    assert import_csv(ws, p) == 2
    assert [(e["patch_id"], e["label"]) for e in ws.label_events()] == [
        (1, "horizontal"),
        (2, None),
    ]


@pytest.mark.parametrize(
    "text,match",
    [
        (
            "photo,label\np0.jpg,none\n",
            r"expected columns patch_id,label or photo,x0,y0,x1,y1,label",
        ),
        ("patch_id,label\n1,none\n99,none\n", r"line 3: no patch with id 99"),
        (
            "patch_id,label\n1,none\n2,vertcal\n",
            r"line 3: unknown class 'vertcal'; choose one of: none,",
        ),
        (
            "photo,x0,y0,x1,y1,label\np0.jpg,0,0,32,32,none\np0.jpg,1,0,33,32,none\n",
            r"no patch \(1, 0, 33, 32\)",
        ),
        ("patch_id,label\nabc,none\n", "must be an integer"),
    ],
)
def test_bad_csv_imports_nothing(tmp_path, text, match):
    ws = make_ws(tmp_path / "a")
    p = tmp_path / "bad.csv"
    p.write_text(text)
    with pytest.raises(LabelsIOError, match=match):
        import_csv(ws, p)
    assert ws.label_events() == []  # one transaction: nothing half-imported


def test_folder_export_and_import_round_trip(tmp_path):
    ws = make_ws(tmp_path / "a")
    ids = [r.id for r in ws.patches()]
    ws.add_labels([(ids[0], "vertical"), (ids[3], "vertical"), (ids[5], None)], reviewer="ana")
    counts = export_folders(ws, tmp_path / "out")
    assert counts == {"vertical": 2, "_unsure": 1}
    rec3 = ws.patches()[3]
    assert rec3.photo == "site1/p1.jpg"  # '/' in the photo name is written as '~'
    assert (
        tmp_path / "out" / "vertical" / folder_file_name(rec3.photo, rec3.box, ".png")
    ).is_file()
    assert folder_file_name(rec3.photo, rec3.box, ".png") == "site1~p1.jpg@0_0_32_32.png"
    fresh = make_ws(tmp_path / "b")
    assert import_folders(fresh, tmp_path / "out") == 3
    assert current(fresh) == current(ws)


def test_folder_import_matches_renamed_files_by_pixels(tmp_path):
    ws = make_ws(tmp_path / "a")
    rec = ws.patches()[2]
    (tmp_path / "in" / "map").mkdir(parents=True)
    shutil.copyfile(ws.root / rec.crop, tmp_path / "in" / "map" / "whatever-name.png")
    (tmp_path / "in" / "map" / ".DS_Store").write_text("x")  # hidden files are ignored
    assert import_folders(ws, tmp_path / "in", reviewer="ext") == 1
    assert ws.label_history(rec.id)[0]["label"] == "map"


def test_bad_folder_imports_nothing(tmp_path):
    ws = make_ws(tmp_path / "a")
    export_root = tmp_path / "out"
    ws.add_labels([(1, "vertical")], reviewer="ana")
    export_folders(ws, export_root)
    fresh = make_ws(tmp_path / "b")
    (export_root / "diagonal").mkdir()
    with pytest.raises(
        LabelsIOError, match=r"folder 'diagonal' is not a class .*choose one of: none,"
    ):
        import_folders(fresh, export_root)
    (export_root / "diagonal").rmdir()
    Image.fromarray(np.zeros((32, 32, 3), np.uint8)).save(export_root / "vertical" / "stray.png")
    with pytest.raises(LabelsIOError, match="stray.png: matches no patch"):
        import_folders(fresh, export_root)
    assert fresh.label_events() == []


def test_one_importer_one_set_of_path_rules(tmp_path):
    # Both key styles go through one importer with one error class; a photo name that
    # could point outside the photo folder is refused whichever way the file is keyed.
    ws = make_ws(tmp_path / "ws")
    csv_path = tmp_path / "labels.csv"
    csv_path.write_text("photo,x0,y0,x1,y1,label\np0.jpg,0,0,32,32,vertical\np0.jpg,32,0,64,32,\n")
    assert import_csv(ws, csv_path) == 2
    recs = ws.patches()
    assert recs[0].label == "vertical" and recs[1].labelled and recs[1].label is None
    for bad, match in [
        ("photo,x0,y0,x1,y1,label\n../p0.jpg,0,0,32,32,none\n", "relative name inside"),
        ("photo,x0,y0,x1,y1,label\n/etc/p0.jpg,0,0,32,32,none\n", "relative name inside"),
        ("photo,x0,y0,x1,y1,label\nsub/p0.jpg,0,0,32,32,none\n", "no patch"),
        ("photo,x0,y0,x1,y1,label\np0.jpg,1,0,33,32,none\n", "no patch"),
        ("photo,x0,y0,x1,y1,label\np0.jpg,0,0,32,32,cracked\n", "unknown class"),
        ("photo,x0,y0,x1,y1,label\nsub\\p0.jpg,0,0,32,32,none\n", "relative name inside"),
        ("photo,label\np0.jpg,none\n", "expected columns"),
    ]:
        csv_path.write_text(bad)
        with pytest.raises(LabelsIOError, match=match):
            import_csv(ws, csv_path)
    # refused files add nothing
    assert sum(len(ws.label_history(r.id)) for r in ws.patches()) == 2


def test_csv_export_neutralises_formula_cells_and_still_reads_back(tmp_path):
    """OWASP "CSV Injection" guidance (cells starting with = + - @ tab CR get a leading
    apostrophe; common practice): a reviewer named like a formula and a photo whose name
    starts with '-' are written as text; the export still imports by place."""
    ws = Workspace.create(tmp_path / "a", class_set=load_class_set("orientation"), tile_px=32)
    ws.add_photo_with_patches(
        name="-0.5.jpg", source_path="/x/-0.5.jpg", width=32, height=32, gsd_mm=None,
        group_id="g", sha256="0" * 64,
        patches=[dict(row=0, col=0, x0=0, y0=0, x1=32, y1=32, crop="patches/a.png",
                      patch_mm=None, focus=1.0, clipped=0.0)],
    )  # fmt: skip
    pid = ws.patches()[0].id
    ws.add_labels([(pid, "map")], reviewer="=cmd|' /C calc'!A0")
    export_csv(ws, tmp_path / "labels.csv")
    with open(tmp_path / "labels.csv", newline="", encoding="utf-8") as fh:
        row = next(csv.DictReader(fh))
    assert row["reviewer"] == "'=cmd|' /C calc'!A0" and row["photo"] == "'-0.5.jpg"
    assert row["x0"] == "0" and float(row["labelled_at"]) > 0  # numbers stay numbers
    # Read back by place (no patch_id column), as another tool's file would be.
    del row["patch_id"]
    with open(tmp_path / "by-place.csv", "w", newline="", encoding="utf-8") as fh:
        w = csv.DictWriter(fh, fieldnames=list(row))
        w.writeheader()
        w.writerow(row)
    ws.add_labels([(pid, "none")], reviewer="x")
    assert import_csv(ws, tmp_path / "by-place.csv") == 1
    assert ws.patches()[0].label == "map"

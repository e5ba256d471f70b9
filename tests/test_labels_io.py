"""Label import and export: CSV and folder-per-class round trips, all-or-nothing imports."""

from __future__ import annotations

import csv
import shutil

import numpy as np
import pytest
from _helpers import make_ws
from PIL import Image

from trainkit.core.csvfile import CsvFileError
from trainkit.core.errors import TrainkitError
from trainkit.core.taxonomy import load_class_set
from trainkit.labels.labels_io import (
    LabelsIOError,
    export_csv,
    export_folders,
    folder_file_name,
    import_csv,
    import_folders,
)
from trainkit.store.workspace import Workspace


def in_subfolder(i):
    """Photo names of the workspaces here: every photo but the first in a subfolder."""
    return f"site{i}/p{i}.jpg" if i else f"p{i}.jpg"


def current(ws):
    return {(r.photo, r.box): (r.labelled, r.label) for r in ws.patches()}


def test_csv_export_reads_back_into_a_fresh_workspace(tmp_path):
    ws = make_ws(tmp_path / "a", 2, 3, photo_name=in_subfolder)
    ids = [r.id for r in ws.patches()]
    ws.add_labels([(ids[0], "vertical"), (ids[1], None), (ids[4], "map")], reviewer="ana")
    ws.add_labels([(ids[0], "none")], reviewer="ben")  # newer: the current label
    assert export_csv(ws, tmp_path / "labels.csv") == 3
    rows = list(csv.DictReader((tmp_path / "labels.csv").open()))
    assert [(r["label"], r["reviewer"]) for r in rows] == [
        ("none", "ben"),
        ("unsure", "ana"),  # the word, so that reading it back records an unsure answer
        ("map", "ana"),
    ]
    fresh = make_ws(tmp_path / "b", 2, 3, photo_name=in_subfolder)
    assert import_csv(fresh, tmp_path / "labels.csv", reviewer="copy") == 3
    assert current(fresh) == current(ws)
    assert {e["origin"] for e in fresh.label_events()} == {"file"}


def test_csv_by_patch_id(tmp_path):
    ws = make_ws(tmp_path / "a", 2, 3, photo_name=in_subfolder)
    p = tmp_path / "ids.csv"
    p.write_text("patch_id,label\n1,horizontal\n2,unsure\n")
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
    ws = make_ws(tmp_path / "a", 2, 3, photo_name=in_subfolder)
    p = tmp_path / "bad.csv"
    p.write_text(text)
    with pytest.raises(LabelsIOError, match=match):
        import_csv(ws, p)
    assert ws.label_events() == []  # one transaction: nothing half-imported


def test_folder_export_and_import_round_trip(tmp_path):
    ws = make_ws(tmp_path / "a", 2, 3, photo_name=in_subfolder)
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
    fresh = make_ws(tmp_path / "b", 2, 3, photo_name=in_subfolder)
    assert import_folders(fresh, tmp_path / "out") == 3
    assert current(fresh) == current(ws)


def test_folder_import_matches_renamed_files_by_pixels(tmp_path):
    ws = make_ws(tmp_path / "a", 2, 3, photo_name=in_subfolder)
    rec = ws.patches()[2]
    (tmp_path / "in" / "map").mkdir(parents=True)
    shutil.copyfile(ws.root / rec.crop, tmp_path / "in" / "map" / "whatever-name.png")
    (tmp_path / "in" / "map" / ".DS_Store").write_text("x")  # hidden files are ignored
    assert import_folders(ws, tmp_path / "in", reviewer="ext") == 1
    assert ws.label_history(rec.id)[0]["label"] == "map"


def test_bad_folder_imports_nothing(tmp_path):
    ws = make_ws(tmp_path / "a", 2, 3, photo_name=in_subfolder)
    export_root = tmp_path / "out"
    ws.add_labels([(1, "vertical")], reviewer="ana")
    export_folders(ws, export_root)
    fresh = make_ws(tmp_path / "b", 2, 3, photo_name=in_subfolder)
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
    ws = make_ws(tmp_path / "ws", 2, 3, photo_name=in_subfolder)
    csv_path = tmp_path / "labels.csv"
    csv_path.write_text(
        "photo,x0,y0,x1,y1,label\np0.jpg,0,0,32,32,vertical\np0.jpg,32,0,64,32,unsure\n"
    )
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


# ----- files as people make them: encodings, long fields, empty and repeated rows ---------------


def test_a_utf8_byte_order_mark_is_accepted(tmp_path):
    # Spreadsheets saving "CSV UTF-8" put U+FEFF first; it is not part of the first column name.
    ws = make_ws(tmp_path / "a", 2, 3, photo_name=in_subfolder)
    p = tmp_path / "bom.csv"
    p.write_bytes("patch_id,label\n1,horizontal\n".encode("utf-8-sig"))
    assert import_csv(ws, p) == 1
    assert ws.patches()[0].label == "horizontal"


def test_a_latin1_file_is_refused_naming_the_file_line_and_encoding(tmp_path):
    ws = make_ws(tmp_path / "a", 2, 3, photo_name=in_subfolder)
    p = tmp_path / "latin.csv"
    p.write_bytes(
        "photo,x0,y0,x1,y1,label\np0.jpg,0,0,32,32,none\nfa\xe7ade.jpg,0,0,32,32,none\n".encode(
            "latin-1"
        )
    )
    with pytest.raises(
        TrainkitError, match=r"label file latin\.csv line 3: not UTF-8 text.*save it as UTF-8"
    ):
        import_csv(ws, p)
    assert ws.label_events() == []


def test_an_oversized_field_is_one_error_naming_the_file_and_line(tmp_path):
    ws = make_ws(tmp_path / "a", 2, 3, photo_name=in_subfolder)
    p = tmp_path / "huge.csv"
    p.write_text("patch_id,label\n1,none\n2," + "x" * (csv.field_size_limit() + 1) + "\n")
    with pytest.raises(CsvFileError, match=r"label file huge\.csv line 3: a field is longer than"):
        import_csv(ws, p)
    assert ws.label_events() == []


def test_rows_without_a_label_are_skipped_and_counted_not_made_unsure(tmp_path):
    ws = make_ws(tmp_path / "a", 2, 3, photo_name=in_subfolder)
    p = tmp_path / "some.csv"
    p.write_text("patch_id,label\n1,horizontal\n2,\n3,  \n4,unsure\n,\n")
    res = import_csv(ws, p)
    assert (res, res.added, res.empty) == (2, 2, 3)  # the blank last row counts as empty too
    cur = {r.id: (r.labelled, r.label) for r in ws.patches()}
    assert cur[1] == (True, "horizontal") and cur[4] == (True, None)  # unsure: an answer
    assert cur[2] == cur[3] == (False, None)  # never labelled: still in the review queue
    assert "3 rows with an empty label skipped" in res.describe(p)
    assert "write 'unsure' to record an unsure answer" in res.describe(p)


def test_repeated_rows_count_once_and_contradicting_rows_are_refused(tmp_path):
    ws = make_ws(tmp_path / "a", 2, 3, photo_name=in_subfolder)
    p = tmp_path / "rep.csv"
    p.write_text("patch_id,label\n1,map\n2,none\n1,map\n1,map\n")
    res = import_csv(ws, p)
    assert (res.added, res.repeated) == (2, 2)
    assert [e["patch_id"] for e in ws.label_events()] == [1, 2]
    assert "2 repeated rows counted once" in res.describe(p)
    p.write_text("patch_id,label\n3,map\n4,none\n3,vertical\n")
    with pytest.raises(
        LabelsIOError,
        match=r"rep\.csv line 4: patch 3 is labelled 'vertical' here and 'map' at rep\.csv line 2",
    ):
        import_csv(ws, p)
    assert len(ws.label_events()) == 2


def test_importing_the_same_labels_again_adds_nothing(tmp_path):
    from trainkit.labels.review import find_conflicts

    ws = make_ws(tmp_path / "a", 2, 3, photo_name=in_subfolder)
    p = tmp_path / "labels.csv"
    p.write_text("patch_id,label\n1,map\n2,none\n3,unsure\n")
    assert import_csv(ws, p) == 3
    again = import_csv(ws, p)
    assert (again, again.unchanged) == (0, 3) and len(ws.label_events()) == 3
    assert "3 already recorded with the same label" in again.describe(p)
    # A reviewer disagrees on patch 1 and settles it; importing the file again must not
    # bring the settled disagreement back (it used to add a new, later import event).
    ws.add_labels([(1, "vertical")], reviewer="ana")
    ws.add_label_event(1, "vertical", reviewer="cy", settles=["ana", "import"])
    assert find_conflicts(ws.label_events()) == {}
    assert import_csv(ws, p) == 0
    assert find_conflicts(ws.label_events()) == {}
    # A changed label in the file is a new answer; another reviewer's import is their own.
    p.write_text("patch_id,label\n2,map\n")
    assert import_csv(ws, p) == 1 and import_csv(ws, p, reviewer="ben") == 1


def test_importing_the_same_folders_again_adds_nothing(tmp_path):
    ws = make_ws(tmp_path / "a", 2, 3, photo_name=in_subfolder)
    ws.add_labels([(1, "vertical"), (4, None)], reviewer="ana")
    export_folders(ws, tmp_path / "out")
    fresh = make_ws(tmp_path / "b", 2, 3, photo_name=in_subfolder)
    assert import_folders(fresh, tmp_path / "out") == 2
    again = import_folders(fresh, tmp_path / "out")
    assert (again, again.unchanged) == (0, 2) and len(fresh.label_events()) == 2


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

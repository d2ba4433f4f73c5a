"""pipeline.review: verdicts written safely, what the viewer loads, crack meshes, guides.

Round-trip tests on the invented run folder of ``tests/_runfixture.py``; the mesh geometry is
checked against scikit-image's marching cubes definition (the 0.5 iso-surface of a binary mask
lies half a voxel outside the outermost voxel centres; Lorensen & Cline 1987) and the wafer edge
against the circle equation.
"""

from __future__ import annotations

import json
import shutil

import numpy as np
import pytest
from _runfixture import ORIGIN_UM, SHAPE, THICKNESS_UM, VOXEL_UM, build_run

from pipeline import omezarr, review, runfolder
from pipeline.errors import InputError


@pytest.fixture(scope="module")
def _template(tmp_path_factory):
    return build_run(tmp_path_factory.mktemp("template") / "run")


@pytest.fixture
def run(_template, tmp_path):
    dst = tmp_path / "run"
    shutil.copytree(_template, dst)
    return dst


def _status(run, defect_id):
    doc = runfolder.read_defects(run / runfolder.DEFECTS_JSON)
    for key in review.DEFECT_LISTS:
        for d in doc[key]:
            if d["id"] == defect_id:
                return d.get("review", {})
    raise AssertionError(defect_id)


def test_apply_review_writes_defects_and_log(run):
    rec = review.apply_review(run, 2, "rejected", "edge chip, not a crack", reviewer="ab")
    assert rec["review"]["status"] == "rejected"
    on_disk = _status(run, 2)
    assert on_disk["status"] == "rejected" and on_disk["note"] == "edge chip, not a crack"
    assert on_disk["reviewer"] == "ab"
    assert _status(run, 1)["status"] == "unreviewed"  # others untouched
    lines = (run / runfolder.REVIEW_LOG).read_text().splitlines()
    assert len(lines) == 1
    entry = json.loads(lines[0])
    assert entry["defect_id"] == 2 and entry["status"] == "rejected" and entry["list"] == "cracks"
    # a loop has an optional review object in the schema; it gets the same fields
    review.apply_review(run / runfolder.VOLUME, 3, "accepted")  # the volume path works too
    assert _status(run, 3)["status"] == "accepted"
    runfolder.validate_defects(runfolder.read_json(run / runfolder.DEFECTS_JSON))


def test_review_survives_reload_and_later_verdict_wins(run):
    review.apply_review(run, 1, "accepted", "clear strain contrast")
    review.apply_review(run, 1, "rejected", "second look: scratch")
    view = review.load_run_for_view(run)
    row = next(r for r in view["rows"] if r["id"] == 1)
    assert row["review"] == "rejected"
    assert review.crack_detail(view, 1)["defect"]["review"]["note"] == "second look: scratch"
    assert len(review.read_review_log(run)) == 2


def test_crash_between_log_and_rewrite_is_replayed(run, monkeypatch):
    review.apply_review(run, 1, "accepted", "first")
    before = (run / runfolder.DEFECTS_JSON).read_bytes()

    def crash(*_a, **_k):
        raise KeyboardInterrupt("power cut")

    monkeypatch.setattr(runfolder, "write_defects", crash)
    with pytest.raises(KeyboardInterrupt):
        review.apply_review(run, 2, "rejected", "second")
    monkeypatch.undo()
    # the file is the old, intact one; the action is in the log
    assert (run / runfolder.DEFECTS_JSON).read_bytes() == before
    assert review.read_review_log(run)[-1]["defect_id"] == 2
    doc = review.load_reviewed_defects(run)
    by_id = {c["id"]: c["review"] for c in doc["cracks"]}
    assert by_id[1]["status"] == "accepted" and by_id[2]["status"] == "rejected"
    assert _status(run, 2)["status"] == "rejected"  # repaired file written back


def test_torn_log_line_is_skipped_and_later_entries_kept(run):
    review.apply_review(run, 1, "accepted", "ok")
    with open(run / runfolder.REVIEW_LOG, "ab") as fh:
        fh.write(b'{"defect_id": 2, "stat')  # crash in the middle of an append
    review.apply_review(run, 3, "rejected", "noise")
    entries = review.read_review_log(run)
    assert [(e["defect_id"], e["status"]) for e in entries] == [(1, "accepted"), (3, "rejected")]
    assert _status(run, 1)["status"] == "accepted"


def test_log_older_than_a_regenerated_defects_file_is_not_replayed(run):
    review.apply_review(run, 1, "rejected", "old run")
    doc = runfolder.read_defects(run / runfolder.DEFECTS_JSON)
    doc["cracks"][0]["review"] = {"status": "unreviewed", "note": ""}
    runfolder.write_defects(run / runfolder.DEFECTS_JSON, doc)  # e.g. measure ran again
    assert review.load_reviewed_defects(run)["cracks"][0]["review"]["status"] == "unreviewed"


@pytest.mark.parametrize(
    ("args", "words"),
    [
        ((1, "maybe", ""), ["maybe", "accepted", "rejected"]),
        ((99, "accepted", ""), ["no defect with id 99", "[1, 2, 3]"]),
    ],
)
def test_bad_review_input(run, args, words):
    with pytest.raises(InputError) as exc:
        review.apply_review(run, *args)
    for w in words:
        assert w in str(exc.value)
    assert not (run / runfolder.REVIEW_LOG).exists()  # nothing written for a refused action


def test_missing_and_corrupt_run_folders(run, tmp_path):
    with pytest.raises(InputError, match="run folder not found"):
        review.load_run_for_view(tmp_path / "nope")
    empty = tmp_path / "empty"
    empty.mkdir()
    with pytest.raises(InputError, match=r"no volume\.ome\.zarr"):
        review.load_run_for_view(empty)
    (run / runfolder.DEFECTS_JSON).write_text('{"schema_version": 1, "cracks": [')
    with pytest.raises(InputError, match=r"defects\.json.*not valid JSON"):
        review.load_run_for_view(run)
    with pytest.raises(InputError, match=r"defects\.json"):
        review.apply_review(run, 1, "accepted")


def test_schema_violation_names_the_key(run):
    doc = runfolder.read_json(run / runfolder.DEFECTS_JSON)
    del doc["cracks"][0]["depth_um"]
    runfolder.write_json_atomic(run / runfolder.DEFECTS_JSON, doc)
    with pytest.raises(InputError, match=r"cracks\[0\].*depth_um"):
        review.load_run_for_view(run)


def test_view_rows_join_assessment(run):
    view = review.load_run_for_view(run)
    rows = {r["id"]: r for r in view["rows"]}
    assert rows[1]["verdict"] == "grows" and rows[1]["margin"] == pytest.approx(0.73)
    assert rows[2]["verdict"] == "does_not_grow"
    assert rows[3]["type"] == "loop" and rows[3]["verdict"] == "not_assessed"
    assert view["thickness_um"] == THICKNESS_UM and view["has_labels"]
    (run / runfolder.ASSESSMENT_JSON).unlink()
    assert {r["verdict"] for r in review.load_run_for_view(run)["rows"]} == {"not_assessed"}


def test_front_points_are_reordered_to_zyx(run):
    view = review.load_run_for_view(run)
    pts, ids = review.front_points_zyx(view)
    c1 = np.asarray(view["defects"]["cracks"][0]["front"]["points_um"])
    np.testing.assert_array_equal(pts[ids == 1], c1[:, ::-1])


@pytest.mark.parametrize("level", [0, 2])
def test_crack_meshes_enclose_the_label_voxels(run, level):
    """marching_cubes at 0.5 on a padded binary mask: vertices span exactly the voxel block
    from half a voxel before the first to half a voxel after the last labelled centre."""
    meshes = {m["id"]: m for m in review.crack_meshes(run, level)}
    assert set(meshes) == {1, 2}  # the loop (id 3) is not a crack
    labels, lmeta = omezarr.open_labels(run / runfolder.VOLUME, "defects", level)
    lab = np.asarray(labels)
    lv = lmeta["levels"][level]
    scale, trans = np.asarray(lv["scale"]), np.asarray(lv["translation"])
    # ... clipped to the box between the volume's outer level-0 voxel centres
    box_lo = np.asarray(ORIGIN_UM)
    box_hi = box_lo + np.asarray(VOXEL_UM) * (np.asarray(SHAPE) - 1)
    for cid, mesh in meshes.items():
        idx = np.argwhere(lab == cid)
        lo = np.maximum(trans + idx.min(0) * scale - scale / 2, box_lo)
        hi = np.minimum(trans + idx.max(0) * scale + scale / 2, box_hi)
        v = mesh["vertices_um"]
        np.testing.assert_allclose(v.min(0), lo, atol=1e-4)
        np.testing.assert_allclose(v.max(0), hi, atol=1e-4)
        # closed surface: every edge is shared by exactly two triangles
        f = mesh["faces"]
        edges = np.sort(np.concatenate([f[:, [0, 1]], f[:, [1, 2]], f[:, [2, 0]]]), axis=1)
        _, counts = np.unique(edges, axis=0, return_counts=True)
        assert np.all(counts == 2)
    with pytest.raises(InputError, match="level 5"):
        review.crack_meshes(run, 5)


def test_orientation_guides(run):
    view = review.load_run_for_view(run)
    g = review.orientation_guides(view)
    assert [s[0, 0] for s in g["surfaces"]] == [0.0, THICKNESS_UM]
    x_hi = ORIGIN_UM[2] + VOXEL_UM[2] * (SHAPE[2] - 1)  # the last voxel centre
    assert g["surfaces"][0][:, 2].max() == pytest.approx(x_hi)
    # the edge polylines lie on the wafer circle (r = 150 mm about the centre) inside the region
    cx, cy = -149.7e3, 0.13e3
    assert len(g["edge"]) == 2
    for line in g["edge"]:
        r = np.hypot(line[:, 2] - cx, line[:, 1] - cy)
        np.testing.assert_allclose(r, 150e3, rtol=1e-12)
        assert line[:, 2].max() <= x_hi and len(line) > 10
    doc = runfolder.read_defects(run / runfolder.DEFECTS_JSON)
    doc["wafer"]["center_xy_mm"] = None
    runfolder.write_defects(run / runfolder.DEFECTS_JSON, doc)
    assert review.orientation_guides(review.load_run_for_view(run))["edge"] == []


def test_crack_meshes_from_component_boxes_equal_full_scan(run):
    """With segment's component table only each crack's box is read; the meshes must not change."""
    from scipy import ndimage

    scanned = review.crack_meshes(run)
    lab = np.asarray(omezarr.open_labels(run / runfolder.VOLUME, "defects", 0)[0])
    comps = [{"id": i + 1, "class": "crack", "bbox_zyx": [s.start for s in box] + [s.stop for s in box]}
             for i, box in enumerate(ndimage.find_objects(lab))]
    runfolder.write_json_atomic(run / runfolder.COMPONENTS_JSON, {"components": comps})
    boxed = review.crack_meshes(run)
    assert [m["id"] for m in boxed] == [m["id"] for m in scanned] == [1, 2]
    for a, b in zip(scanned, boxed, strict=True):
        np.testing.assert_allclose(a["vertices_um"], b["vertices_um"], atol=1e-4)
        np.testing.assert_array_equal(a["faces"], b["faces"])


def test_crack_surface_merges_meshes_with_label_colours(run):
    view = review.load_run_for_view(run)
    meshes = review.crack_meshes(run)
    verts, faces, rgba = review.crack_surface(view)
    assert len(verts) == sum(len(m["vertices_um"]) for m in meshes) == len(rgba)
    assert faces.max() == len(verts) - 1
    n1 = len(meshes[0]["vertices_um"])
    np.testing.assert_allclose(rgba[0], np.array([255, 60, 0, 255]) / 255)  # crack 1's colour
    np.testing.assert_allclose(rgba[n1], np.array([255, 200, 0, 255]) / 255)  # crack 2's colour
    np.testing.assert_array_equal(faces[len(meshes[0]["faces"]):], meshes[1]["faces"] + n1)

"""Review of automatic findings: what the viewer reads and writes in a run folder.

A person accepts or rejects every automatic finding before a wafer is scrapped or released. The
viewer (``viewer_plugins``) is a thin adapter over this module; everything here is plain Python
and NumPy/SciPy, so it is tested without a display and never imports napari or Qt.

Crash safety of a review action (:func:`apply_review`):

1. the action is appended to ``review_log.jsonl`` (one JSON object per line) and the file is
   flushed and fsync'ed: once this returns, the action is on disk;
2. ``defects.json`` is rewritten atomically (temporary file, fsync, rename) with the new
   ``review`` fields.

A crash between 1 and 2 leaves the old ``defects.json`` intact and the action in the log. On every
load (:func:`load_reviewed_defects`) the log entries written after ``defects.json`` was last
written are replayed, so no earlier review is ever lost; replaying an entry twice is harmless
because each entry sets the review fields to absolute values. A torn last line (crash in the middle
of an append) is skipped with a warning and cannot corrupt later lines.
"""

from __future__ import annotations

import json
import logging
import os
import time
from contextlib import contextmanager
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
from scipy import ndimage
from skimage.measure import marching_cubes

from pipeline import omezarr, runfolder
from pipeline.errors import InputError

try:  # POSIX advisory lock: two viewers on one run must not interleave a read-modify-write
    import fcntl
except ImportError:  # pragma: no cover - Windows laptops: no lock, the log still keeps order
    fcntl = None  # type: ignore[assignment]

log = logging.getLogger(__name__)

REVIEW_STATUSES = ("unreviewed", "accepted", "rejected")
# defects.json list key -> the short name the viewer shows for that kind of finding
DEFECT_LISTS = {"cracks": "crack", "dislocation_loops": "loop", "slip_bands": "slip_band"}
FALLBACK_RGBA = (1.0, 0.45, 0.0, 1.0)  # a crack whose label has no colour in image-label


# --------------------------------------------------------------------------------------------
# locating a run
# --------------------------------------------------------------------------------------------
def resolve_run_root(path: str | Path) -> Path:
    """The run folder for a path that is the run folder itself or its ``volume.ome.zarr``.

    Raises
    ------
    InputError
        If the path does not exist or is neither a run folder nor a crackstack volume.
    """
    p = Path(path).expanduser()
    if not p.exists():
        raise InputError(f"{p}: run folder not found; give the folder `crackstack run --out` wrote")
    if p.is_dir() and (p / "zarr.json").is_file():
        # a volume opened directly: its run folder is the parent when that holds the run files
        return p.parent if p.name == runfolder.VOLUME else p
    if p.is_dir():
        return p
    raise InputError(f"{p}: not a run folder (a file); give the folder that holds {runfolder.VOLUME}")


def _volume_path(run_root: Path) -> Path:
    """``volume.ome.zarr`` of a run root, or the root itself when it is a standalone volume."""
    if (run_root / "zarr.json").is_file():
        return run_root
    vol = run_root / runfolder.VOLUME
    if not (vol / "zarr.json").is_file():
        raise InputError(
            f"{run_root}: no {runfolder.VOLUME} (has reconstruct run?); "
            f"is this a crackstack run folder?"
        )
    return vol


def is_run_folder(path: str | Path) -> bool:
    """True when ``path`` looks like something this module opens (cheap; no metadata parsed)."""
    p = Path(path)
    if not p.is_dir():
        return False
    if (p / "zarr.json").is_file():
        return p.name.endswith(".zarr")
    return any((p / n).exists() for n in (runfolder.VOLUME, runfolder.DEFECTS_JSON, runfolder.RUN_JSON))


# --------------------------------------------------------------------------------------------
# the review log
# --------------------------------------------------------------------------------------------
@contextmanager
def _locked(run_root: Path):
    lock_path = run_root / ".review.lock"
    with open(lock_path, "a+") as fh:
        if fcntl is not None:
            fcntl.flock(fh.fileno(), fcntl.LOCK_EX)
        try:
            yield
        finally:
            if fcntl is not None:
                fcntl.flock(fh.fileno(), fcntl.LOCK_UN)


def _append_log(log_path: Path, entry: dict) -> None:
    line = json.dumps(entry, sort_keys=True)
    with open(log_path, "ab+") as fh:
        # a crash in the middle of an earlier append leaves a line without its newline: start a
        # fresh line so the torn one stays the only unreadable line
        fh.seek(0, os.SEEK_END)
        if fh.tell() > 0:
            fh.seek(-1, os.SEEK_END)
            if fh.read(1) != b"\n":
                fh.write(b"\n")
        fh.write(line.encode("utf-8") + b"\n")
        fh.flush()
        os.fsync(fh.fileno())


def read_review_log(run_root: str | Path) -> list[dict]:
    """All readable entries of ``review_log.jsonl`` in the order they were written."""
    path = Path(run_root) / runfolder.REVIEW_LOG
    if not path.is_file():
        return []
    entries = []
    for n, raw in enumerate(path.read_bytes().splitlines(), start=1):
        if not raw.strip():
            continue
        try:
            entry = json.loads(raw)
            if not isinstance(entry, dict) or "defect_id" not in entry or "status" not in entry:
                raise ValueError("missing defect_id/status")
        except ValueError as exc:
            log.warning("%s line %d: unreadable review entry skipped (%s)", path, n, exc)
            continue
        entries.append(entry)
    return entries


def _find_defect(doc: dict, defect_id: int) -> tuple[str, dict]:
    hits = [(key, d) for key in DEFECT_LISTS for d in doc.get(key, []) if int(d["id"]) == defect_id]
    if not hits:
        ids = sorted(int(d["id"]) for key in DEFECT_LISTS for d in doc.get(key, []))
        raise InputError(f"defects.json: no defect with id {defect_id}; ids present: {ids}")
    if len(hits) > 1:
        raise InputError(f"defects.json: id {defect_id} is used by {len(hits)} defects; ids must be unique")
    return hits[0]


def _set_review(defect: dict, entry: dict) -> bool:
    """Apply one log entry to a defect record; True when something changed."""
    new = {"status": entry["status"], "note": entry.get("note", "")}
    if entry.get("reviewer"):
        new["reviewer"] = entry["reviewer"]
    if entry.get("time_utc"):
        new["reviewed_utc"] = entry["time_utc"]
    old = defect.get("review", {})
    if old == new:
        return False
    defect["review"] = new
    return True


def load_reviewed_defects(run_root: str | Path) -> dict | None:
    """``defects.json`` of a run with every review action of the log applied.

    Log entries written after ``defects.json``'s last write (a crash between the two steps of
    :func:`apply_review`) are replayed and the repaired file is written back atomically.

    Returns
    -------
    dict or None
        The validated document, or None when the run has no ``defects.json`` (yet).

    Raises
    ------
    InputError
        If ``defects.json`` is corrupt or does not match the schema (message names the key).
    """
    root = Path(run_root)
    path = root / runfolder.DEFECTS_JSON
    if not path.exists():
        return None
    doc = runfolder.read_defects(path)
    written_s = path.stat().st_mtime
    changed = False
    for entry in read_review_log(root):
        # an entry is time-stamped before its defects.json write, so an entry older than the
        # file's mtime is in it; a newer one may not be (crash between the two steps) and is
        # applied again, which is harmless since it sets absolute values
        if float(entry.get("time_unix", 0.0)) < written_s:
            continue
        try:
            _, defect = _find_defect(doc, int(entry["defect_id"]))
        except InputError as exc:
            log.warning("review log entry for a defect not in defects.json skipped: %s", exc)
            continue
        changed |= _set_review(defect, entry)
    if changed:
        log.warning("%s: replayed review actions missing from defects.json", path)
        try:
            runfolder.write_defects(path, doc)
        except PermissionError:  # a read-only copy of a run: show the repaired reviews anyway
            log.warning("%s: read-only; repaired reviews shown but not written back", path)
    return doc


def apply_review(
    run_root: str | Path, defect_id: int, status: str, note: str = "", reviewer: str | None = None,
) -> dict:
    """Record one person's verdict on one finding (crack, loop or slip band).

    Parameters
    ----------
    run_root
        The run folder (or its ``volume.ome.zarr``).
    defect_id
        The finding's ``id`` in ``defects.json`` (= its label value in ``labels/defects``).
    status
        ``"accepted"``, ``"rejected"`` or ``"unreviewed"`` (to take a verdict back).
    note
        Free text kept with the verdict.
    reviewer
        Optional name or initials stored with the verdict and in the log.

    Returns
    -------
    dict
        The updated defect record as now stored in ``defects.json``.

    Raises
    ------
    InputError
        Unknown status or id, or no / a corrupt ``defects.json``.
    """
    if status not in REVIEW_STATUSES:
        raise InputError(f"review status {status!r} not accepted; use one of {', '.join(REVIEW_STATUSES)}")
    if not isinstance(note, str):
        raise InputError(f"review note must be text, got {type(note).__name__}")
    root = resolve_run_root(run_root)
    path = root / runfolder.DEFECTS_JSON
    if not path.is_file():
        raise InputError(f"{root}: no {runfolder.DEFECTS_JSON} to review (has measure run?)")
    with _locked(root):
        doc = load_reviewed_defects(root)
        list_key, defect = _find_defect(doc, int(defect_id))
        now = time.time()
        entry = {
            "defect_id": int(defect_id),
            "list": list_key,
            "status": status,
            "note": note,
            "reviewer": reviewer or "",
            "time_unix": now,
            "time_utc": datetime.fromtimestamp(now, UTC).isoformat(timespec="seconds"),
        }
        _append_log(root / runfolder.REVIEW_LOG, entry)  # step 1: durable before the rewrite
        _set_review(defect, entry)
        runfolder.write_defects(path, doc)  # step 2: atomic replace
    log.info("defect %d %s by %s", defect_id, status, reviewer or "(anonymous)")
    return defect


# --------------------------------------------------------------------------------------------
# what the viewer shows
# --------------------------------------------------------------------------------------------
def _assessment_by_id(assessment: dict | None) -> dict[int, dict]:
    if not assessment:
        return {}
    return {int(c["id"]): c for c in assessment.get("cracks", []) if "id" in c}


def defect_rows(view: dict) -> list[dict]:
    """One flat row per finding for the defect table (numbers in their file units).

    Keys: ``id``, ``type`` (crack | loop | slip_band), ``kind``, ``depth_um``,
    ``depth_sigma_um``, ``length_um``, ``length_sigma_um``, ``margin``, ``verdict``,
    ``review``, ``center_um`` ([x, y, z]).
    """
    doc = view.get("defects") or {}
    by_id = _assessment_by_id(view.get("assessment"))
    rows = []
    for c in doc.get("cracks", []):
        a = by_id.get(int(c["id"]), {})
        rows.append({
            "id": int(c["id"]), "type": "crack", "kind": c["kind"],
            "depth_um": c["depth_um"], "depth_sigma_um": c["uncertainty"]["depth_um"],
            "length_um": c["length_um"], "length_sigma_um": c["uncertainty"]["length_um"],
            "margin": a.get("margin"), "verdict": a.get("verdict", "not_assessed"),
            "review": c["review"]["status"], "center_um": list(c["centroid_um"]),
        })
    for lp in doc.get("dislocation_loops", []):
        rows.append({
            "id": int(lp["id"]), "type": "loop", "kind": "dislocation_loop",
            "depth_um": lp["center_um"][2], "depth_sigma_um": None,
            "length_um": lp["diameter_um"], "length_sigma_um": None,
            "margin": None, "verdict": "not_assessed",
            "review": lp.get("review", {}).get("status", "unreviewed"), "center_um": list(lp["center_um"]),
        })
    for sb in doc.get("slip_bands", []):
        rows.append({
            "id": int(sb["id"]), "type": "slip_band", "kind": "slip_band",
            "depth_um": None, "depth_sigma_um": None, "length_um": sb["extent_um"],
            "length_sigma_um": None, "margin": None, "verdict": "not_assessed",
            "review": sb.get("review", {}).get("status", "unreviewed"),
            "center_um": list(sb["center_um"]) if "center_um" in sb else None,
        })
    return rows


def load_run_for_view(run_root: str | Path) -> dict:
    """Everything the viewer needs from a run folder, read through the run-folder functions.

    Parameters
    ----------
    run_root
        The run folder or its ``volume.ome.zarr``.

    Returns
    -------
    dict
        ``root`` (Path), ``volume_path`` (Path), ``meta`` (:func:`pipeline.omezarr.read_meta`),
        ``has_labels`` (bool), ``thickness_um`` (float or None), ``defects`` (validated
        ``defects.json`` with the review log applied, or None), ``assessment`` (dict or None),
        ``rows`` (:func:`defect_rows`). Nothing of the volume itself is read.

    Raises
    ------
    InputError
        Missing folder or volume, corrupt metadata, ``defects.json`` or ``assessment.json``.
    """
    root = resolve_run_root(run_root)
    vol = _volume_path(root)
    meta = omezarr.read_meta(vol)
    has_labels = (vol / runfolder.LABELS / "zarr.json").is_file()
    defects = load_reviewed_defects(root)
    apath = root / runfolder.ASSESSMENT_JSON
    assessment = runfolder.read_json(apath, "assessment") if apath.exists() else None
    if assessment is not None and not isinstance(assessment, dict):
        raise InputError(f"{apath}: assessment must be a JSON object, got {type(assessment).__name__}")
    thickness = meta["crackstack"].get("thickness_um")
    if thickness is None and defects is not None:
        thickness = defects["wafer"]["thickness_um"]
    view = {
        "root": root, "volume_path": vol, "meta": meta, "has_labels": has_labels,
        "thickness_um": None if thickness is None else float(thickness),
        "defects": defects, "assessment": assessment,
    }
    view["rows"] = defect_rows(view)
    return view


def crack_detail(view: dict, defect_id: int) -> dict:
    """The record of one finding and, for a crack, its assessment entry (or None)."""
    doc = view.get("defects")
    if doc is None:
        raise InputError(f"{view['root']}: no {runfolder.DEFECTS_JSON}")
    list_key, defect = _find_defect(doc, int(defect_id))
    return {
        "type": DEFECT_LISTS[list_key], "defect": defect,
        "assessment": _assessment_by_id(view.get("assessment")).get(int(defect_id)),
    }


def crack_meshes(run_root: str | Path, level: int | None = None) -> list[dict]:
    """Triangle meshes of every crack's label mask, for 3D display.

    Marching cubes (Lorensen & Cline 1987, via :func:`skimage.measure.marching_cubes`) at the
    0.5 iso-level of each crack's binary mask, padded by one empty voxel so every surface is closed.

    Parameters
    ----------
    run_root
        The run folder or its volume.
    level
        Pyramid level of ``labels/defects`` to mesh; None = the coarsest. With segment's
        ``components.json`` only each crack's box is read; without it the whole level (1/64 of
        the level-0 voxels for three levels: ~67 MB of uint32 labels for a 4 GB float32 volume).

    Returns
    -------
    list of dict
        Per crack: ``id``, ``vertices_um`` (V, 3) float32 world coordinates (z, y, x) in um,
        clipped to the box of the volume's outer voxel centres, ``faces`` (F, 3) int32. Cracks
        without voxels at that level are left out.
    """
    root = resolve_run_root(run_root)
    vol = _volume_path(root)
    doc = load_reviewed_defects(root)
    if doc is None or not doc.get("cracks"):
        return []
    n_levels = len(omezarr.read_meta(vol)["levels"])
    level = n_levels - 1 if level is None else int(level)
    if not 0 <= level < n_levels:
        raise InputError(f"{vol}: label level {level} not present (levels 0..{n_levels - 1})")
    labels, lmeta = omezarr.open_labels(vol, "defects", level)
    scale = np.asarray(lmeta["levels"][level]["scale"], float)
    offset = np.asarray(lmeta["levels"][level]["translation"], float)
    crack_ids = [int(c["id"]) for c in doc["cracks"]]
    box_lo, box_hi = volume_box_um({"meta": omezarr.read_meta(vol), "volume_path": vol})
    boxes = _level_boxes(root, crack_ids, level, labels.shape)
    if boxes is None:  # no component table: one pass over the whole (coarse) label level
        lab = np.asarray(labels)
        found = ndimage.find_objects(lab, max_label=max(crack_ids))
        boxes = {cid: found[cid - 1] for cid in crack_ids if found[cid - 1] is not None}
        crops = {cid: lab[box] for cid, box in boxes.items()}
    else:  # read only each crack's box
        crops = {cid: np.asarray(labels[box]) for cid, box in boxes.items()}
    meshes = []
    for cid in crack_ids:
        if cid not in boxes or not np.any(crops[cid] == cid):
            log.info("crack %d has no voxels at label level %d; no mesh", cid, level)
            continue
        mask = np.pad(crops[cid] == cid, 1).astype(np.float32)
        verts, faces, _, _ = marching_cubes(mask, 0.5, spacing=tuple(scale))
        start = np.array([s.start - 1 for s in boxes[cid]], float)  # -1: the padding voxel
        # clipped to the volume's voxel-centre box (moves only the half-voxel skin of cracks
        # that reach a face) so meshes never widen the viewer's world range
        verts_um = np.clip(verts + offset + start * scale, box_lo, box_hi)
        meshes.append({"id": cid, "vertices_um": verts_um.astype(np.float32), "faces": faces.astype(np.int32)})
    return meshes


def crack_surface(view: dict, level: int | None = None) -> tuple[np.ndarray, np.ndarray, np.ndarray] | None:
    """All crack meshes of :func:`crack_meshes` merged into one, coloured per crack.

    Returns
    -------
    (vertices_um, faces, rgba) or None
        (V, 3) float32 (z, y, x) um, (F, 3) int32, (V, 4) float RGBA in 0..1 from the label
        image's ``image-label.colors`` (orange for a crack without one); None without cracks.
    """
    meshes = crack_meshes(view["root"], level)
    if not meshes:
        return None
    colors = label_colors(omezarr.read_meta(view["volume_path"] / runfolder.LABELS))
    offsets = np.cumsum([0] + [len(m["vertices_um"]) for m in meshes[:-1]])
    verts = np.concatenate([m["vertices_um"] for m in meshes])
    faces = np.concatenate([m["faces"] + o for m, o in zip(meshes, offsets, strict=True)]).astype(np.int32)
    rgba = np.concatenate([np.tile(colors.get(m["id"], FALLBACK_RGBA), (len(m["vertices_um"]), 1))
                           for m in meshes])
    return verts, faces, rgba


def _level_boxes(root: Path, ids: list[int], level: int, shape: tuple[int, ...]) -> dict | None:
    """Per id, the slice box at pyramid ``level`` that holds its voxels, from the level-0
    ``bbox_zyx`` of ``components.json`` (segment's table) with one coarse voxel of margin (floor
    halving drops odd edge voxels, and the box must hold the mask's zero border); None when
    there is no table."""
    path = root / runfolder.COMPONENTS_JSON
    if not path.is_file():
        return None
    try:
        comps = {int(c["id"]): c["bbox_zyx"] for c in runfolder.read_json(path, "component table")["components"]}
    except (KeyError, TypeError, ValueError, InputError) as exc:
        log.warning("%s unusable for crack boxes (%s); scanning the labels instead", path, exc)
        return None
    f = 2**level
    boxes = {}
    for cid in ids:
        if cid not in comps:
            continue
        b = comps[cid]
        boxes[cid] = tuple(
            slice(max(0, b[i] // f - 1), min(n, -(-b[i + 3] // f) + 1)) for i, n in enumerate(shape)
        )
    return boxes


def orientation_guides(view: dict) -> dict:
    """Outlines of the wafer's entrance and exit surfaces and its edge over the imaged region.

    Returns
    -------
    dict
        ``surfaces``: list of (4, 3) arrays, the imaged region's rectangle at z = 0 and at
        z = thickness, as (z, y, x) um; ``edge``: list of (N, 3) polylines of the wafer edge
        (circle of the wafer diameter about ``center_xy_mm``) inside the imaged region at both
        surfaces, empty when the centre is unknown or the edge is outside the region.
    """
    extra = view["meta"]["crackstack"]
    # the region between the outer voxel centres (narrowed to the scanned x/y ranges when the
    # writer recorded them): guides never reach past the volume, so they never widen napari's
    # world range (which would re-slice the volume once more while a run opens)
    lo, hi = volume_box_um(view)
    x0, x1 = _clip_range(extra.get("x_range_um"), lo[2], hi[2])
    y0, y1 = _clip_range(extra.get("y_range_um"), lo[1], hi[1])
    thickness = view.get("thickness_um")
    z_levels = [z for z in (0.0, thickness) if z is not None and lo[0] <= z <= hi[0]]
    rect_yx = np.array([[y0, x0], [y0, x1], [y1, x1], [y1, x0]], float)
    surfaces = [np.column_stack([np.full(4, z), rect_yx]) for z in z_levels]
    edge = []
    wafer = (view.get("defects") or {}).get("wafer", {})
    center = wafer.get("center_xy_mm")
    if center is not None and wafer.get("diameter_mm"):
        cx, cy = 1000.0 * np.asarray(center, float)
        radius = 500.0 * float(wafer["diameter_mm"])
        # sample the circle only where it can cross the region, ~200 points over the region's
        # diagonal: the chord error is then below 1e-3 um for a 300 mm wafer and a 5 mm region
        diag = np.hypot(x1 - x0, y1 - y0)
        ang_c = np.arctan2(0.5 * (y0 + y1) - cy, 0.5 * (x0 + x1) - cx)
        half = min(np.pi, diag / radius + 1e-3)
        n = int(min(20000, max(16, 200 * 2 * half * radius / diag)))
        t = np.linspace(ang_c - half, ang_c + half, n)
        xs, ys = cx + radius * np.cos(t), cy + radius * np.sin(t)
        inside = (xs >= x0) & (xs <= x1) & (ys >= y0) & (ys <= y1)
        if inside.sum() >= 2:
            for z in z_levels:
                edge.append(np.column_stack([np.full(inside.sum(), z), ys[inside], xs[inside]]))
    return {"surfaces": surfaces, "edge": edge}


def volume_box_um(view: dict) -> tuple[np.ndarray, np.ndarray]:
    """World (z, y, x) um of the first and last voxel centres of level 0."""
    meta = view["meta"]
    shape = np.asarray(_level0_shape(view["volume_path"], meta), float)
    org = np.asarray(meta["origin_um"], float)
    return org, org + np.asarray(meta["voxel_um"], float) * (shape - 1)


def _clip_range(rng, lo: float, hi: float) -> tuple[float, float]:
    if rng is None:
        return float(lo), float(hi)
    a, b = sorted(float(v) for v in rng)
    return max(a, float(lo)), min(b, float(hi))


def _level0_shape(vol: Path, meta: dict) -> tuple[int, int, int]:
    import zarr

    return tuple(zarr.open_array(str(vol / meta["levels"][0]["path"]), mode="r").shape)


def front_points_zyx(view: dict) -> tuple[np.ndarray, np.ndarray]:
    """All sampled crack-front points as napari world coordinates.

    Returns
    -------
    points_zyx_um : (N, 3) float array
        ``front.points_um`` ([x, y, z] wafer um) reordered to (z, y, x).
    ids : (N,) int array
        The crack id of each point.
    """
    pts, ids = [], []
    for c in (view.get("defects") or {}).get("cracks", []):
        p = np.asarray(c["front"]["points_um"], float).reshape(-1, 3)
        pts.append(p[:, ::-1])
        ids.append(np.full(len(p), int(c["id"])))
    if not pts:
        return np.zeros((0, 3)), np.zeros(0, int)
    return np.concatenate(pts), np.concatenate(ids)


def loop_points_zyx(view: dict) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Dislocation-loop centres (N, 3) as (z, y, x) um, their diameters (N,) um and ids (N,)."""
    loops = (view.get("defects") or {}).get("dislocation_loops", [])
    if not loops:
        return np.zeros((0, 3)), np.zeros(0), np.zeros(0, int)
    c = np.array([lp["center_um"] for lp in loops], float)[:, ::-1]
    d = np.array([lp["diameter_um"] for lp in loops], float)
    return c, d, np.array([int(lp["id"]) for lp in loops])


def world_to_grid(zyx_um: np.ndarray, meta: dict) -> np.ndarray:
    """World coordinates (..., 3) as (z, y, x) um -> fractional level-0 voxel indices (z, y, x).

    The viewer puts every layer on the volume's voxel grid (scale = voxel size, translate =
    origin), so adding a layer never changes the viewer's slider steps or re-slices the volume.
    """
    return (np.asarray(zyx_um, float) - np.asarray(meta["origin_um"])) / np.asarray(meta["voxel_um"])


def label_colors(meta_labels: dict) -> dict[int, tuple[float, float, float, float]]:
    """``image-label.colors`` of a label image as {label value: RGBA in 0..1}."""
    il = meta_labels.get("ome", {}).get("image-label", {})
    return {int(c["label-value"]): tuple(v / 255.0 for v in c["rgba"]) for c in il.get("colors", [])}

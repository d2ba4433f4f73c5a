"""Score a defect export against a synthetic ground truth: detection and geometry errors.

Found and true defects are paired by the optimal one-to-one assignment that minimises the summed
centre distance (cracks: ``centroid_um``; loops: ``center_um``), pairs farther apart than
``match_um`` being forbidden (scipy's ``linear_sum_assignment``, the Hungarian method:
H. W. Kuhn (1955), Naval Res. Logist. Q. 2, 83-97; D. F. Crouse (2016), IEEE Trans. Aerosp.
Electron. Syst. 52, 1679-1696). Unpaired true defects are misses (fn), unpaired found ones false
detections (fp).

Errors are signed, found minus true. Slip bands are not scored: the export gives them no
position to pair on.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from scipy.optimize import linear_sum_assignment

from pipeline.crystal import same_family
from pipeline.runfolder import validate_defects

_FORBIDDEN = 1e12


def _pair(found: list[dict], truth: list[dict], key: str, match_um: float):
    """Optimal pairs (i_found, j_truth, distance) within ``match_um``."""
    if not found or not truth:
        return []
    f = np.array([d[key] for d in found], float)
    t = np.array([d[key] for d in truth], float)
    dist = np.linalg.norm(f[:, None, :] - t[None, :, :], axis=2)
    cost = np.where(dist <= match_um, dist, _FORBIDDEN)
    rows, cols = linear_sum_assignment(cost)
    return [
        (int(i), int(j), float(dist[i, j]))
        for i, j in zip(rows, cols, strict=True)
        if dist[i, j] <= match_um
    ]


def _normal_angle_deg(a, b) -> float:
    """Angle between two planes (sign-insensitive normals), degrees."""
    na, nb = np.asarray(a, float), np.asarray(b, float)
    c = abs(float(na @ nb)) / (np.linalg.norm(na) * np.linalg.norm(nb))
    return math.degrees(math.acos(min(1.0, c)))


def _azimuth_error_deg(found: float, true: float) -> float:
    """Signed azimuth difference wrapped to (-90, 90] (azimuths are defined modulo 180)."""
    d = (found - true) % 180.0
    return d - 180.0 if d > 90.0 else d


def _summary(values: list[float]) -> dict[str, float | None]:
    if not values:
        return {"mean_abs": None, "max_abs": None, "rms": None, "mean": None}
    v = np.asarray(values, float)
    return {
        "mean_abs": float(np.mean(np.abs(v))),
        "max_abs": float(np.max(np.abs(v))),
        "rms": float(np.sqrt(np.mean(v * v))),
        "mean": float(np.mean(v)),
    }


def _detection(n_found: int, n_true: int, tp: int) -> dict[str, Any]:
    fp, fn = n_found - tp, n_true - tp
    recall = tp / n_true if n_true else None
    precision = tp / n_found if n_found else None
    f1 = (
        2 * recall * precision / (recall + precision)
        if recall is not None and precision is not None and recall + precision > 0
        else None
    )
    return {"tp": tp, "fp": fp, "fn": fn, "recall": recall, "precision": precision, "f1": f1}


def _result(
    found: list[dict], truth: list[dict], pairs: list, matches: list[dict], error_keys: tuple[str, ...]
) -> dict[str, Any]:
    """Detection counts, the matches, the unpaired ids and a summary of each error key."""
    paired_f = {i for i, _, _ in pairs}
    paired_t = {j for _, j, _ in pairs}
    out = _detection(len(found), len(truth), len(pairs))
    out.update(
        {
            "matches": matches,
            "missed_ids": [t["id"] for j, t in enumerate(truth) if j not in paired_t],
            "false_ids": [f["id"] for i, f in enumerate(found) if i not in paired_f],
            "errors": {key: _summary([m[key] for m in matches]) for key in error_keys},
        }
    )
    return out


def _score_cracks(found: list[dict], truth: list[dict], match_um: float) -> dict:
    pairs = _pair(found, truth, "centroid_um", match_um)
    matches = []
    for i, j, dist in pairs:
        f, t = found[i], truth[j]
        matches.append(
            {
                "truth_id": t["id"],
                "found_id": f["id"],
                "distance_um": dist,
                "kind_right": f["kind"] == t["kind"],
                "depth_error_um": f["depth_um"] - t["depth_um"],
                "length_error_um": f["length_um"] - t["length_um"],
                "inclination_error_deg": f["plane"]["inclination_deg"]
                - t["plane"]["inclination_deg"],
                "azimuth_error_deg": _azimuth_error_deg(
                    f["plane"]["azimuth_deg"], t["plane"]["azimuth_deg"]
                ),
                "normal_angle_deg": _normal_angle_deg(f["plane"]["normal"], t["plane"]["normal"]),
                "plane_family_right": same_family(
                    f["plane"]["nearest_hkl"], t["plane"]["nearest_hkl"]
                ),
            }
        )
    out = _result(
        found, truth, pairs, matches,
        ("distance_um", "depth_error_um", "length_error_um", "inclination_error_deg",
         "azimuth_error_deg", "normal_angle_deg"),
    )
    out["plane_family_right_fraction"] = (
        sum(m["plane_family_right"] for m in matches) / len(matches) if matches else None
    )
    return out


def _score_loops(found: list[dict], truth: list[dict], match_um: float) -> dict:
    pairs = _pair(found, truth, "center_um", match_um)
    matches = []
    for i, j, dist in pairs:
        f, t = found[i], truth[j]
        matches.append(
            {
                "truth_id": t["id"],
                "found_id": f["id"],
                "distance_um": dist,
                "diameter_error_um": f["diameter_um"] - t["diameter_um"],
                "normal_angle_deg": _normal_angle_deg(f["plane"]["normal"], t["plane"]["normal"]),
                "plane_family_right": same_family(
                    f["plane"]["nearest_hkl"], t["plane"]["nearest_hkl"]
                ),
            }
        )
    return _result(found, truth, pairs, matches, ("distance_um", "diameter_error_um", "normal_angle_deg"))


def score(defects: dict, truth: dict, *, match_um: float = 50.0) -> dict:
    """Match a defect export to a ground truth and report detection and geometry errors.

    Parameters
    ----------
    defects : dict
        A defect export (``defects.json``, SPEC section 7), e.g. a pipeline run's.
    truth : dict
        A ground truth (``ground_truth.json`` of a synthetic series); the same schema.
    match_um : float
        Largest centre distance at which a found defect may be paired with a true one, um.

    Returns
    -------
    dict
        ``{"match_um", "cracks": {...}, "loops": {...}}``; each kind has ``tp, fp, fn, recall,
        precision, f1`` (``None`` where undefined: no true or no found defects), ``matches``
        (per pair: ids, distance and signed errors; cracks: depth, length, inclination,
        azimuth, angle between the normals, ``plane_family_right``, ``kind_right``; loops:
        diameter, normal angle, family), ``missed_ids``, ``false_ids`` and ``errors`` (mean_abs,
        max_abs, rms, mean per error).

    Raises
    ------
    InputError
        When either document does not follow the defect-export schema.
    """
    if not match_um > 0:
        raise ValueError(f"match_um must be > 0 (got {match_um})")
    validate_defects(defects, "defects")
    validate_defects(truth, "ground truth")
    return {
        "match_um": float(match_um),
        "cracks": _score_cracks(defects["cracks"], truth["cracks"], match_um),
        "loops": _score_loops(defects["dislocation_loops"], truth["dislocation_loops"], match_um),
    }

"""The assess stage: defect export + load source -> assessment.json (SPEC section 8).

Crack geometries and recipes here are invented; the expected numbers come from the handbook
solutions named beside each check.
"""

from __future__ import annotations

import copy
import json
import math
from pathlib import Path

import numpy as np
import pytest

from pipeline import assess, runfolder
from pipeline import thermal as th
from pipeline.errors import InputError
from pipeline.recipe import load_recipe

REPO = Path(__file__).resolve().parents[1]
DEMO_RECIPE = REPO / "configs" / "demo_recipe.yaml"
R_MM, T_UM = 150.0, 775.0
S3 = 1 / math.sqrt(3)


def _crack(cid, kind, *, r_mm=149.95, angle=0.0, depth=100.0, length=775.0, span=(0.0, 775.0),
           normal=(0.0, 1.0, 0.0), incl=90.0, az=0.0, hkl=(1, -1, 0), family="{110}", status="unreviewed"):
    d_edge = None if r_mm is None else (R_MM - r_mm) * 1e3
    c = 0.5 * length
    return {
        "id": cid, "kind": kind, "centroid_um": [0.0, 0.0, 0.5 * (span[0] + span[1])],
        "position": {"r_mm": r_mm, "angle_deg": angle, "distance_to_edge_um": d_edge},
        "depth_um": depth, "length_um": length, "thickness_span_um": list(span),
        "front": {"a_um": depth, "c_um": c, "aspect": depth / c if c else 0.0, "points_um": [], "fit_rms_um": 1.0},
        "plane": {"normal": list(normal), "inclination_deg": incl, "azimuth_deg": az, "nearest_hkl": list(hkl),
                  "family": family, "misfit_deg": 0.5, "fit_rms_um": 1.0},
        "uncertainty": {"depth_um": 2.0, "length_um": 3.0, "inclination_deg": 1.0},
        "review": {"status": status, "note": ""},
    }


def _defects(cracks):
    doc = {
        "schema_version": 1, "software": {"name": "test", "version": "0"},
        "wafer": {"diameter_mm": 2 * R_MM, "thickness_um": T_UM,
                  "crystal": {"z_uvw": [0, 0, 1], "x_uvw": [1, 1, 0]}, "center_xy_mm": None},
        "acquisition": {"energy_keV": 17.479, "reflection": [2, 2, 0], "geometry": "transmission",
                        "voxel_um": [5.0, 5.0, 5.0]},
        "cracks": cracks, "dislocation_loops": [], "slip_bands": [],
    }
    runfolder.validate_defects(doc)
    return doc


def _stress_csv(path, sigma_theta_MPa, sigma_r_MPa=0.0, times=(0.0, 1.0), radii=(0.0, 75.0, 140.0, 150.0)):
    lines = ["time_s,r_mm,sigma_r_MPa,sigma_theta_MPa"]
    for t in times:
        for r in radii:
            lines.append(f"{t},{r},{sigma_r_MPa},{sigma_theta_MPa}")
    path.write_text("\n".join(lines) + "\n")
    return path


def _one(doc, cid):
    return next(c for c in doc["cracks"] if c["id"] == cid)


# --- stress CSV: handbook checks -------------------------------------------------------------------


def test_uniform_hoop_stress_on_radial_edge_crack(tmp_path):
    # 50 MPa hoop stress on a 100 um radial edge crack through the thickness:
    # K_I = 1.12 * 50 MPa * sqrt(pi * 100 um) = 0.99 MPa sqrt(m) (edge crack in a half plane,
    # Tada, Paris & Irwin handbook), within 3 %.
    doc = assess.assess_defects(_defects([_crack(1, "edge")]), stress_csv=_stress_csv(tmp_path / "s.csv", 50.0))
    c = _one(doc, 1)
    assert c["model"] == "edge_through_weight_function"
    assert c["K_I_max_MPa_sqrt_m"] == pytest.approx(1.12 * 50 * math.sqrt(math.pi * 100e-6), rel=0.03)
    assert c["K_I_max_MPa_sqrt_m"] == pytest.approx(0.99, rel=0.03)
    assert c["sigma_at_worst_MPa"] == pytest.approx(50.0, rel=1e-9)
    # {110} plane: K_IC 0.90 (Chen & Leipold 1980, from memory) < K_I -> grows
    assert c["K_IC_MPa_sqrt_m"] == pytest.approx(0.90)
    assert c["margin"] == pytest.approx(0.90 / c["K_I_max_MPa_sqrt_m"], rel=1e-12)
    assert c["verdict"] == "grows" and doc["wafer_verdict"] == "grows"
    assert c["critical_dT_C"] is None  # no temperatures in a stress CSV
    assert doc["cautions"] == assess.CAUTIONS


def test_K_scales_with_stress_and_sqrt_depth(tmp_path):
    cracks = [_crack(1, "edge", depth=100.0), _crack(2, "edge", depth=400.0)]
    d20 = assess.assess_defects(_defects(cracks), stress_csv=_stress_csv(tmp_path / "a.csv", 20.0))
    d60 = assess.assess_defects(_defects(cracks), stress_csv=_stress_csv(tmp_path / "b.csv", 60.0))
    k = {(s, i): _one(d, i)["K_I_max_MPa_sqrt_m"] for s, d in ((20, d20), (60, d60)) for i in (1, 2)}
    assert k[(60, 1)] == pytest.approx(3 * k[(20, 1)], rel=1e-9)
    # uniform stress: K ~ sqrt(a) times the ratio of Tada's finite-width factors (W = diameter)
    from pipeline.fracture import edge_crack_factor_tada as F

    width = F(400e-6 / 0.3) / F(100e-6 / 0.3)
    assert k[(20, 2)] == pytest.approx(2 * k[(20, 1)] * width, rel=1e-9)
    assert width == pytest.approx(1.0, abs=1e-3)
    assert _one(d20, 1)["verdict"] == "does_not_grow"


def test_zero_stress_gives_zero_K(tmp_path):
    doc = assess.assess_defects(_defects([_crack(1, "edge"), _crack(2, "surface_top", r_mm=100.0, depth=50,
                                                                     length=200, span=(0, 50))]),
                                stress_csv=_stress_csv(tmp_path / "z.csv", 0.0))
    for c in doc["cracks"]:
        assert c["K_I_max_MPa_sqrt_m"] == 0.0
        assert c["margin"] is None and c["verdict"] == "does_not_grow"


def test_inclined_111_edge_crack_mixed_mode(tmp_path):
    # A {111} plane containing the radial <110> trace of a (001) wafer, under hoop stress:
    # sigma_n = 2/3 sigma, tau = sqrt(2)/3 sigma (cubic geometry). With the same geometry factor,
    # K_I = 2/3 and K_II = 0.4714 of the vertical crack's K; K_eq = sqrt(K_I^2 + K_II^2) from
    # G = (K_I^2 + K_II^2)/E' (Irwin; Erdogan & Sih 1963).
    vertical = _crack(1, "edge", depth=300.0)
    # normal of (1-11) in the wafer frame (x = [110], y = [-110], z = [001]): (0, -sqrt(2/3), sqrt(1/3))
    inclined = _crack(2, "edge", depth=300.0, normal=(0.0, -math.sqrt(2 / 3), S3), incl=54.7356,
                      hkl=(1, -1, 1), family="{111}")
    doc = assess.assess_defects(_defects([vertical, inclined]), stress_csv=_stress_csv(tmp_path / "s.csv", 30.0))
    v, c = _one(doc, 1), _one(doc, 2)
    assert c["K_I_max_MPa_sqrt_m"] == pytest.approx(2 / 3 * v["K_I_max_MPa_sqrt_m"], rel=1e-9)
    assert c["K_II_at_worst_MPa_sqrt_m"] == pytest.approx(math.sqrt(2) / 3 * v["K_I_max_MPa_sqrt_m"], rel=1e-9)
    assert c["K_eq_max_MPa_sqrt_m"] == pytest.approx(math.sqrt(2 / 3) * v["K_I_max_MPa_sqrt_m"], rel=1e-9)
    assert c["K_IC_plane"] == "{111}" and c["K_IC_MPa_sqrt_m"] == pytest.approx(0.82)
    assert c["margin_eq"] == pytest.approx(0.82 / c["K_eq_max_MPa_sqrt_m"], rel=1e-12)
    assert any("inclined plane" in n for n in c["notes"])


def test_surface_crack_uses_newman_raju(tmp_path):
    # Semi-elliptical surface crack under uniform tension normal to its plane (a tangential
    # crack at angle 0 whose normal is e_r sees sigma_r): K = S sqrt(pi a/Q) F at the point of
    # largest F (Newman & Raju 1981); a/c = 0.5, a/t = 100/775.
    crack = _crack(1, "surface_top", r_mm=80.0, angle=0.0, depth=100.0, length=400.0, span=(0.0, 100.0),
                   normal=(1.0, 0.0, 0.0), az=90.0, hkl=(1, 1, 0))
    doc = assess.assess_defects(_defects([crack]), stress_csv=_stress_csv(tmp_path / "s.csv", 0.0, sigma_r_MPa=40.0))
    from pipeline import fracture as fr

    phi = np.linspace(0, math.pi, 37)
    nr = fr.newman_raju_surface(0.5, 100 / 775, 200e-6 / 0.15, phi)
    expected = 40.0 * math.sqrt(math.pi * 100e-6 / nr.Q) * nr.F.max()
    c = _one(doc, 1)
    assert c["model"] == "surface_newman_raju"
    assert c["K_I_max_MPa_sqrt_m"] == pytest.approx(expected, rel=1e-9)
    assert c["verdict"] == "does_not_grow"


def test_corner_and_edge_face_cracks(tmp_path):
    # an edge crack reaching only the entrance face -> Newman-Raju corner crack; one touching
    # neither face -> semi-ellipse on the edge face
    cracks = [_crack(1, "edge", depth=200.0, length=150.0, span=(0.0, 150.0)),
              _crack(2, "edge", depth=100.0, length=150.0, span=(300.0, 450.0))]
    doc = assess.assess_defects(_defects(cracks), stress_csv=_stress_csv(tmp_path / "s.csv", 50.0))
    assert _one(doc, 1)["model"] == "corner_newman_raju"
    assert _one(doc, 2)["model"] == "edge_face_newman_raju"
    # a shallow corner quarter-circle has F = 1.134 (Newman & Raju 1984): a = 150, c = 200 um here
    assert _one(doc, 1)["K_I_max_MPa_sqrt_m"] > 0


def test_outside_validity_is_flagged(tmp_path):
    cracks = [
        _crack(1, "edge", depth=20000.0),  # 20 mm: beyond 0.1 R of the half-plane weight function
        _crack(2, "surface_top", r_mm=100.0, depth=700.0, length=1000.0, span=(0.0, 700.0)),  # a/t = 0.9
        _crack(3, "edge", depth=100.0),
    ]
    doc = assess.assess_defects(_defects(cracks), stress_csv=_stress_csv(tmp_path / "s.csv", 10.0))
    assert _one(doc, 1)["verdict"] == "outside_validity"
    assert _one(doc, 2)["verdict"] == "outside_validity"
    assert any("a/t" in p for p in _one(doc, 2)["validity"]["problems"])
    assert _one(doc, 3)["verdict"] == "does_not_grow"
    assert doc["wafer_verdict"] == "outside_validity"


def test_rejected_cracks_are_skipped_and_input_untouched(tmp_path):
    defects = _defects([_crack(1, "edge"), _crack(2, "edge", status="rejected")])
    before = copy.deepcopy(defects)
    doc = assess.assess_defects(defects, stress_csv=_stress_csv(tmp_path / "s.csv", 5.0))
    assert [c["id"] for c in doc["cracks"]] == [1]
    assert doc["skipped_cracks"] == [{"id": 2, "reason": "rejected in review"}]
    assert defects == before


def test_unknown_position_is_said(tmp_path):
    doc = assess.assess_defects(_defects([_crack(1, "edge", r_mm=None, angle=None)]),
                                stress_csv=_stress_csv(tmp_path / "s.csv", 50.0))
    c = _one(doc, 1)
    assert any("assumed to start at the wafer edge" in n for n in c["notes"])
    assert c["K_I_max_MPa_sqrt_m"] == pytest.approx(0.99, rel=0.03)


# --- temperature CSV ---------------------------------------------------------------------------------


def _temperature_csv(path, T0_C, dT_C, times=(0.0, 1.0, 2.0), n_r=301):
    r = np.linspace(0.0, R_MM, n_r)
    lines = ["time_s,r_mm,T_C"]
    for k, t in enumerate(times):
        amp = dT_C * k / (len(times) - 1)
        for rr in r:
            lines.append(f"{t},{rr:.6f},{T0_C + amp * (rr / R_MM) ** 2:.9f}")
    path.write_text("\n".join(lines) + "\n")
    return path


def test_temperature_csv_parabolic_profile(tmp_path):
    # T = T0 - dT (r/b)^2 (rim colder): rim hoop stress +alpha E dT/2 (Timoshenko & Goodier 1970);
    # alpha from Okada & Tokumaru (1984) at the rim's temperatures, E the (001) in-plane mean.
    p = _temperature_csv(tmp_path / "t.csv", 300.0, -20.0)
    doc = assess.assess_defects(_defects([_crack(1, "edge", depth=150.0)]), temperature_csv=p)
    c = _one(doc, 1)
    E = doc["inputs"]["material"]["E"]["value_GPa"] * 1e9
    alpha = float(th.alpha_okada_tokumaru(290.0 + th.KELVIN))
    assert c["worst_time_s"] == 2.0
    assert c["sigma_at_worst_MPa"] == pytest.approx(alpha * E * 20.0 / 2 / 1e6, rel=0.01)
    # the critical edge-centre difference scales the worst profile by the margin
    assert c["dT_edge_center_at_worst_C"] == pytest.approx(-20.0, abs=1e-6)
    assert c["critical_dT_C"] == pytest.approx(-20.0 * c["margin"], rel=1e-12)
    assert doc["timeline"]["T_center_C"][-1] == pytest.approx(300.0)
    assert doc["timeline"]["T_edge_C"][-1] == pytest.approx(280.0)


def test_hot_field_is_not_judged_by_lefm(tmp_path):
    # whole process above 700 degC: LEFM not applied (brittle-to-ductile range ~500-700 degC,
    # St John 1975; Samuels & Roberts 1989, from memory); the slip check reports the resolved
    # shear stress but, without a user tau_c, does not judge it.
    p = _temperature_csv(tmp_path / "t.csv", 900.0, -30.0)
    doc = assess.assess_defects(_defects([_crack(1, "edge")]), temperature_csv=p)
    c = _one(doc, 1)
    assert c["verdict"] == "outside_validity"
    assert c["slip"]["risk"] == "not_judged" and c["slip"]["tau_max_MPa"] > 0
    # rim in uniaxial hoop tension along <110> at angle 0 of a (001) wafer: Schmid factor 0.4082
    assert c["slip"]["tau_max_MPa"] == pytest.approx(0.4082 * doc["wafer"]["sigma_theta_edge_max_MPa"], rel=1e-3)


# --- recipe ------------------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def demo_doc():
    cracks = [_crack(1, "edge", depth=100.0), _crack(2, "edge", depth=3000.0, angle=30.0),
              _crack(3, "surface_top", r_mm=120.0, angle=45.0, depth=60.0, length=240.0, span=(0.0, 60.0),
                     normal=(-math.sin(math.pi / 4), math.cos(math.pi / 4), 0.0), az=45.0, hkl=(0, 1, 0),
                     family="{100}")]
    return assess.assess_defects(_defects(cracks), recipe_path=DEMO_RECIPE)


def test_demo_recipe_document(demo_doc, tmp_path):
    doc = demo_doc
    for key in ("schema_version", "inputs", "cautions", "wafer_verdict", "cracks", "timeline"):
        assert key in doc
    for c in doc["cracks"]:
        for key in ("id", "model", "K_I_max_MPa_sqrt_m", "K_IC_MPa_sqrt_m", "margin", "worst_time_s",
                    "sigma_at_worst_MPa", "critical_dT_C", "verdict", "notes", "history"):
            assert key in c
        assert len(c["history"]["time_s"]) <= assess.MAX_HISTORY_POINTS
        assert c["verdict"] in ("grows", "does_not_grow", "outside_validity")
    tl = doc["timeline"]
    assert len(tl["time_s"]) <= assess.MAX_HISTORY_POINTS
    assert len(tl["T_center_C"]) == len(tl["T_edge_C"]) == len(tl["time_s"])
    assert max(tl["T_center_C"]) == pytest.approx(1050.0, abs=3.0)
    # the rim runs ahead on the ramp (compression) and behind on the cool-down (tension)
    assert doc["wafer"]["dT_edge_center_max_C"] > 0 > doc["wafer"]["dT_edge_center_min_C"]
    assert doc["wafer"]["sigma_theta_edge_min_time_s"] < doc["wafer"]["sigma_theta_edge_max_time_s"]
    # JSON round trip through the atomic writer, no NaN/inf
    out = tmp_path / "assessment.json"
    assess.write_assessment(out, doc)
    text = out.read_text()
    assert "NaN" not in text and "Infinity" not in text
    assert json.loads(text)["wafer_verdict"] == doc["wafer_verdict"]
    rows = assess.format_rows(doc)
    assert [r["id"] for r in rows] == [1, 2, 3]
    assert set(rows[0]) == {"id", "model", "K_I_max", "K_IC", "margin", "worst_time_s", "verdict"}


def test_demo_recipe_edge_cracks(demo_doc):
    small, large = _one(demo_doc, 1), _one(demo_doc, 2)
    # edge cracks are loaded on the cool-down, with the rim below the LEFM limit temperature
    assert small["worst_time_s"] > 20.5 and small["T_at_worst_C"] < 700.0
    assert small["sigma_at_worst_MPa"] > 0
    # K grows with the crack; the critical dT is negative (rim colder than centre)
    assert large["K_I_max_MPa_sqrt_m"] > small["K_I_max_MPa_sqrt_m"]
    assert small["critical_dT_C"] < 0
    assert small["slip"]["risk"] in ("slip_likely", "below_tau_c")  # the demo recipe sets tau_c


def test_recipe_material_override(tmp_path):
    text = DEMO_RECIPE.read_text().replace("material: {}", "material: {K_IC_110_MPa_sqrt_m: 0.5, E_GPa: 130}")
    p = tmp_path / "r.yaml"
    p.write_text(text)
    doc = assess.assess_defects(_defects([_crack(1, "edge")]), recipe_path=p)
    assert _one(doc, 1)["K_IC_MPa_sqrt_m"] == 0.5
    assert doc["inputs"]["material"]["E"] == {"value_GPa": 130.0, "source": "recipe override"}


# --- bad inputs ---------------------------------------------------------------------------------------


def test_exactly_one_source(tmp_path):
    d = _defects([_crack(1, "edge")])
    with pytest.raises(InputError, match="exactly one"):
        assess.assess_defects(d)
    p = _stress_csv(tmp_path / "s.csv", 1.0)
    with pytest.raises(InputError, match="exactly one"):
        assess.assess_defects(d, stress_csv=p, temperature_csv=p)


@pytest.mark.parametrize("text, message", [
    ("time_s,r_mm,sigma_r_MPa,sigma_theta_MPa\n0,0,0,abc\n", r"line 2, column 'sigma_theta_MPa': 'abc' is not a number"),
    ("time_s,r_mm,sigma_r_MPa\n0,0,0\n", r"line 1: header must name the columns"),
    ("time_s,r_mm,sigma_r_MPa,sigma_tehta_MPa\n0,0,0,1\n", r"did you mean 'sigma_theta_MPa'"),
    ("time_s,r_mm,sigma_r_MPa,sigma_theta_MPa\n0,0,0\n", r"line 2: expected 4 values"),
    ("time_s,r_mm,sigma_r_MPa,sigma_theta_MPa\n0,0,0,1\n0,0,0,2\n", r"lines 2 and 3: two rows"),
    ("time_s,r_mm,sigma_r_MPa,sigma_theta_MPa\n0,0,0,1\n0,1,0,1\n1,0,0,1\n", r"no row for time_s = 1, r_mm = 1"),
    ("time_s,r_mm,sigma_r_MPa,sigma_theta_MPa\n0,-1,0,1\n0,1,0,1\n", r"line 2, column 'r_mm'.*negative"),
    ("time_s,r_mm,sigma_r_MPa,sigma_theta_MPa\n0,0,0,nan\n", r"line 2, column 'sigma_theta_MPa'.*not finite"),
    ("# only a comment\n", r"no data"),
])
def test_bad_stress_csv(tmp_path, text, message):
    p = tmp_path / "bad.csv"
    p.write_text(text)
    with pytest.raises(InputError, match=message) as err:
        assess.assess_defects(_defects([_crack(1, "edge")]), stress_csv=p)
    assert str(p) in str(err.value)


@pytest.mark.parametrize("rows, message", [
    ("0,0,25\n0,100,25\n", r"must reach the wafer edge r = 150 mm"),
    ("0,20,25\n0,150,25\n", r"must start near the centre"),
    ("0,0,25\n0,150,1500\n", r"line 3, column 'T_C': 1500 degC"),
])
def test_bad_temperature_csv(tmp_path, rows, message):
    p = tmp_path / "bad.csv"
    p.write_text("time_s,r_mm,T_C\n" + rows)
    with pytest.raises(InputError, match=message):
        assess.assess_defects(_defects([_crack(1, "edge")]), temperature_csv=p)


def test_missing_csv(tmp_path):
    with pytest.raises(InputError, match="not found"):
        assess.assess_defects(_defects([_crack(1, "edge")]), stress_csv=tmp_path / "nope.csv")


@pytest.mark.parametrize("yaml_text, message", [
    ("segments:\n  - {type: ramp, target_C: 600, rate_K_per_sec: 50}\n", r"segments\[0\]: rate_K_per_sec: unknown key; did you mean 'rate_K_per_s'"),
    ("segments:\n  - {type: ramp, target_C: 600, rate_K_per_s: 50}\n  - {type: ramp, target_C: 500, rate_K_per_s: 5}\n",
     r"segments\[1\]: ramp target_C 500.0 is not above the current 600.0 degC; use type: cool"),
    ("segments:\n  - {type: hold}\n", r"segments\[0\].*a hold needs duration_s"),
    ("segments:\n  - {type: soak, duration_s: 3}\n", r"segments\[0\]: type"),
    ("emisivity: 0.5\nsegments:\n  - {type: hold, duration_s: 3}\n", r"did you mean 'emissivity'"),
    ("segments:\n  - {type: hold, duration_s: 3}\nmodel: {tau_c: 3}\n", r"model.tau_c: unknown key; did you mean 'tau_c_MPa'"),
    ("segments: []\n", r"segments"),
    ("segments:\n  - {type: ramp, target_C: 1500, rate_K_per_s: 50}\n", r"target_C"),
])
def test_bad_recipe(tmp_path, yaml_text, message):
    p = tmp_path / "r.yaml"
    p.write_text(yaml_text)
    with pytest.raises(InputError, match=message) as err:
        load_recipe(p)
    assert str(p) in str(err.value)


def test_demo_recipe_loads():
    r = load_recipe(DEMO_RECIPE)
    pieces = r.setpoint_pieces()
    assert pieces[0].T_start_K == pytest.approx(25 + th.KELVIN)
    assert r.model.tau_c_MPa is not None
    # piecewise-linear set temperature: each piece ends where the next starts
    for a, b in zip(pieces[:-1], pieces[1:], strict=True):
        assert a.T_set(a.t_end_s) == pytest.approx(b.T_start_K)
        assert a.t_end_s == pytest.approx(b.t_start_s)

"""Coefficient export (CSV, JSON, NPZ) and profile import from CSV."""

import json
import math
import os

import numpy as np
import pytest

from quietlayer.engine import EPS0, Boundary, Profile, ScenarioError, Side, layer_table, layer_tables
from quietlayer.engine import export
from quietlayer.engine.defaults import default_scenario
from quietlayer.engine.export import (coefficient_rows, coefficients_csv, coefficients_json, coefficients_npz,
                                      profile_from_csv, read_coefficients_csv)

COLUMN_SUFFIXES = ("depth", "sigma", "kappa", "alpha", "b", "c")
JSON_KEYS = {"depth": "depth_m", "sigma": "sigma_S_per_m", "kappa": "kappa", "alpha": "alpha_S_per_m",
             "b": "b", "c": "c"}


def mixed_scenario(**changes):
    """Different layers on each side, one side without a CPML."""
    boundary = Boundary(
        left=Side(cells=6, order=2.0, sigma_ratio=0.7),
        right=Side(cells=10, order=3.0, kappa_max=5.0, alpha_max=0.05, alpha_order=1.0),
        bottom=Side(kind="wall"),
        top=Side(cells=8, order=4.0, sigma_max=25.0, kappa_max=2.5, alpha_max=0.01, alpha_order=2.0),
    )
    return default_scenario(boundary=boundary, precision="float64", **changes)


def assert_bitwise(got, expected):
    got, expected = np.asarray(got), np.asarray(expected)
    assert got.dtype == np.float64 and expected.dtype == np.float64
    assert got.shape == expected.shape
    assert np.array_equal(got.view(np.uint64), expected.view(np.uint64))


# --- coefficients out -------------------------------------------------------

@pytest.mark.parametrize("polarization, node_field, half_field", [("TMz", "Ez", "Hx/Hy"), ("TEz", "Hz", "Ex/Ey")])
def test_csv_round_trip_is_bitwise(polarization, node_field, half_field):
    s = mixed_scenario(polarization=polarization)
    tables = layer_tables(s)
    back = read_coefficients_csv(coefficients_csv(s))
    assert set(back) == {"left", "right", "top"} == set(tables)
    for side, table in tables.items():
        assert back[side]["node"]["field"] == node_field
        assert back[side]["half"]["field"] == half_field
        for position in ("node", "half"):
            for suffix in COLUMN_SUFFIXES:
                assert_bitwise(back[side][position][JSON_KEYS[suffix]], getattr(table, f"{position}_{suffix}"))


def test_rows_cover_every_cpml_side_position_and_depth():
    s = mixed_scenario(polarization="TEz")
    rows = coefficient_rows(s)
    # left 6 cells: 7 nodes + 6 half nodes; right 10: 11 + 10; top 8: 9 + 8
    assert len(rows) == 13 + 21 + 17
    assert {r["side"] for r in rows} == {"left", "right", "top"}
    assert set(rows[0]) == {"side", "position", "field", "depth_m", "sigma_S_per_m", "kappa",
                            "alpha_S_per_m", "b", "c"}
    assert {(r["position"], r["field"]) for r in rows} == {("node", "Hz"), ("half", "Ex/Ey")}
    top_half = [r for r in rows if r["side"] == "top" and r["position"] == "half"]
    assert [r["depth_m"] for r in top_half] == layer_table(s, "top").half_depth.tolist()


def test_csv_header_carries_units_and_comments_describe_the_run():
    s = mixed_scenario(title="Bench\nwith a line break")
    text = coefficients_csv(s)
    lines = text.splitlines()
    comments = [line for line in lines if line.startswith("#")]
    assert all(line.startswith("# ") for line in comments)
    assert lines[:len(comments)] == comments  # comments come first
    header = lines[len(comments)]
    assert header.split(",") == ["side", "position", "field", "depth (m)", "sigma (S/m)", "kappa (1)",
                                 "alpha (S/m)", "b (1)", "c (1)"]
    joined = "\n".join(comments)
    assert "# title: Bench with a line break" in comments  # a newline must not end the comment
    assert f"# dx (m): {s.dx!r}" in comments and f"# dy (m): {s.dy!r}" in comments
    assert f"# dt (s): {s.dt!r}" in comments
    assert "TMz" in joined
    for unit_line in ("depth (m): unit m", "sigma (S/m): unit S/m", "kappa (1): unit 1",
                      "alpha (S/m): unit S/m", "b (1): unit 1", "c (1): unit 1"):
        assert unit_line in joined


def test_exported_b_and_c_follow_the_recursive_convolution_formula():
    # b = exp(-(sigma/kappa + alpha) dt/eps0), c = sigma (b - 1)/(sigma kappa + kappa^2 alpha)
    # (Roden & Gedney 2000), recomputed from the exported sigma, kappa, alpha
    s = mixed_scenario()
    for side, positions in read_coefficients_csv(coefficients_csv(s)).items():
        for pos in positions.values():
            sig, kap, alp = pos["sigma_S_per_m"], pos["kappa"], pos["alpha_S_per_m"]
            b = np.exp(-(sig / kap + alp) * s.dt / EPS0)
            denom = sig * kap + kap**2 * alp
            c = np.where(sig > 0, sig * (b - 1) / np.where(denom > 0, denom, 1.0), 0.0)
            np.testing.assert_allclose(pos["b"], b, rtol=1e-13)
            np.testing.assert_allclose(pos["c"], c, rtol=1e-9, atol=1e-15)


def test_json_parses_and_matches_the_tables():
    s = mixed_scenario(polarization="TEz")
    data = json.loads(coefficients_json(s))
    assert data["scenario"] == {"title": s.title, "dx_m": s.dx, "dy_m": s.dy, "dt_s": s.dt,
                                "polarization": "TEz", "precision": "float64"}
    assert data["units"]["sigma_S_per_m"] == "S/m" and data["units"]["depth_m"] == "m"
    assert data["units"]["kappa"] == "1" and data["units"]["dt_s"] == "s"
    tables = layer_tables(s)
    assert set(data["sides"]) == set(tables)
    for side, table in tables.items():
        entry = data["sides"][side]
        assert entry["sigma_max_S_per_m"] == table.sigma_max
        assert entry["sigma_opt_S_per_m"] == table.sigma_opt
        assert entry["node"]["field"] == "Hz" and entry["half"]["field"] == "Ex/Ey"
        for position in ("node", "half"):
            for suffix in COLUMN_SUFFIXES:
                assert_bitwise(np.array(entry[position][JSON_KEYS[suffix]]),
                               getattr(table, f"{position}_{suffix}"))


def test_npz_reloads_and_leaves_no_temporary_file(tmp_path):
    s = mixed_scenario()
    target = tmp_path / "layer.npz"
    assert coefficients_npz(s, target) == target
    coefficients_npz(s, str(target))  # overwriting goes through the same rename
    assert sorted(os.listdir(tmp_path)) == ["layer.npz"]
    with np.load(target, allow_pickle=False) as z:
        assert str(z["polarization"]) == "TMz" and str(z["title"]) == s.title
        assert float(z["dt"]) == s.dt and float(z["dx"]) == s.dx and float(z["dy"]) == s.dy
        assert "bottom_node_sigma" not in z.files
        for side, table in layer_tables(s).items():
            assert float(z[f"{side}_sigma_max"]) == table.sigma_max
            assert str(z[f"{side}_node_field"]) == "Ez" and str(z[f"{side}_half_field"]) == "Hx/Hy"
            for position in ("node", "half"):
                for suffix in COLUMN_SUFFIXES:
                    assert_bitwise(z[f"{side}_{position}_{suffix}"], getattr(table, f"{position}_{suffix}"))


def test_npz_failure_keeps_the_old_file_and_removes_the_temporary(tmp_path, monkeypatch):
    s = mixed_scenario()
    target = tmp_path / "layer.npz"
    target.write_bytes(b"old")

    def broken_savez(fh, **arrays):
        fh.write(b"partial")
        raise OSError("disk full")

    monkeypatch.setattr(export.np, "savez", broken_savez)
    with pytest.raises(OSError):
        coefficients_npz(s, target)
    assert sorted(os.listdir(tmp_path)) == ["layer.npz"]
    assert target.read_bytes() == b"old"


# --- profiles in ------------------------------------------------------------

def test_profile_in_millimetres_with_semicolons_comments_and_bracketed_units():
    text = ("# exported from my solver\n"
            "Depth [mm];Sigma [S/m];KAPPA;alpha (s/m)\n"
            "\n"
            "0;0;1;0.05\n"
            "# a comment between rows\n"
            "1.5;2.5;1.25;0.02\n"
            "3;10;2;0\n"
            ";;;\n")
    p = profile_from_csv(text)
    assert p.depth == (0.0, 0.0015, 0.003)  # mm -> m by the exact factor 1000
    assert p.sigma == (0.0, 2.5, 10.0)
    assert p.kappa == (1.0, 1.25, 2.0)
    assert p.alpha == (0.05, 0.02, 0.0)


def test_profile_in_micrometres_with_tabs_any_column_order_and_extra_columns():
    text = ("kappa\tdepth (um)\tnote\tsigma (S/m)\talpha (S/m)\n"
            "1\t0\tface\t0\t0.1\n"
            "1.5\t500\tmiddle\t4e-1\t0.05\n"
            "3\t1000\twall\t1.6E+00\t0\n")
    p = profile_from_csv(text)
    assert p.depth == (0.0, 0.0005, 0.001)
    assert p.sigma == (0.0, 0.4, 1.6)
    assert p.kappa == (1.0, 1.5, 3.0)


def test_profile_with_comma_separators_quoted_header_and_metres():
    text = '\ufeff"depth (m)","sigma (S/m)","kappa (1)","alpha (S/m)"\r\n0,0,1,0\r\n0.01,5,1,0\r\n'
    p = profile_from_csv(text)
    assert p.depth == (0.0, 0.01) and p.sigma == (0.0, 5.0)


def test_profile_from_a_polynomial_table_reproduces_it_at_the_nodes():
    graded = Side(cells=10, order=3.0, sigma_ratio=1.2, kappa_max=5.0, alpha_max=0.05, alpha_order=1.0)
    s = default_scenario(graded, precision="float64")
    table = layer_table(s, "right")
    lines = ["depth (m),sigma (S/m),kappa,alpha (S/m)"]
    lines += [",".join(repr(float(v)) for v in row)
              for row in zip(table.node_depth, table.node_sigma, table.node_kappa, table.node_alpha)]
    profile = profile_from_csv("\n".join(lines) + "\n")
    tabulated = s.with_changes(boundary=Boundary.all_sides(Side(cells=10, profile=profile)))
    again = layer_table(tabulated, "right")
    # linear interpolation at its own knots returns the knot values, so the node
    # columns and the b, c made from them are the same bits (common practice, no source)
    for suffix in COLUMN_SUFFIXES:
        assert_bitwise(getattr(again, f"node_{suffix}"), getattr(table, f"node_{suffix}"))
    # half nodes fall midway between tabulated nodes: linear interpolation gives the
    # mean of the two, which lies above a convex grading (common practice, no source)
    midway = 0.5 * (table.node_sigma[:-1] + table.node_sigma[1:])
    np.testing.assert_allclose(again.half_sigma, midway, rtol=1e-14)
    assert np.all(again.half_sigma >= table.half_sigma)


GOOD_HEADER = "depth (m),sigma (S/m),kappa,alpha (S/m)\n"


@pytest.mark.parametrize("text, field, in_message", [
    ("depth (m),sigma (S/m),alpha (S/m)\n0,0,0\n0.01,1,0\n", "profile", "kappa"),
    (GOOD_HEADER + "0,0,1,0\n0.005,abc,1,0\n0.01,1,1,0\n", "profile.sigma (line 3)", "abc"),
    ("# comment\n" + GOOD_HEADER + "0,0,1,0\n0.01,1,1,0\n0.02,nan,1,0\n", "profile.sigma (line 5)", "nan"),
    (GOOD_HEADER + "0,0,1,0\n0.01,1e999,1,0\n", "profile.sigma (line 3)", "finite"),
    (GOOD_HEADER + "0,0,1,0\n0.01,,1,0\n", "profile.sigma (line 3)", "number"),
    (GOOD_HEADER + "0,0,1,0\n0.02,1,1,0\n0.01,2,1,0\n", "profile.depth", "increasing"),
    (GOOD_HEADER + "0,0,1,0\n0.01,-1,1,0\n", "profile.sigma", ">= 0"),
    (GOOD_HEADER + "0,0,1,0\n0.01,1,0.5,0\n", "profile.kappa", ">= 1"),
    (GOOD_HEADER + "0,0,1,0\n0.01,1,1,-0.1\n", "profile.alpha", ">= 0"),
    ("", "profile", "header"),
    ("# only a comment\n\n", "profile", "header"),
    (GOOD_HEADER, "profile.depth", "at least 2 rows"),
    (GOOD_HEADER + "0,0,1,0\n0.01,1,1\n", "profile (line 3)", "4 cells"),
    ("depth (ft),sigma,kappa,alpha\n0,0,1,0\n1,1,1,0\n", "profile.depth (line 1)", "mm"),
    ("depth,sigma (mS/m),kappa,alpha\n0,0,1,0\n1,1,1,0\n", "profile.sigma (line 1)", "S/m"),
    ("depth,sigma,kappa,depth,alpha\n0,0,1,0,0\n1,1,1,1,0\n", "profile.depth", "once"),
    ("depth;sigma;kappa;alpha\n0;0;1;0\n0,01;1;1;0\n", "profile.depth (line 3)", "decimal mark"),
])
def test_bad_profile_files_name_the_field(text, field, in_message):
    with pytest.raises(ScenarioError) as info:
        profile_from_csv(text)
    assert info.value.field == field
    assert in_message in str(info.value)


def test_missing_column_lists_found_and_allowed_columns():
    with pytest.raises(ScenarioError) as info:
        profile_from_csv("depth (m);sigma;alfa\n0;0;0\n0.01;1;0\n")
    message = str(info.value)
    assert "alfa" in message  # what was found
    assert "depth, sigma, kappa, alpha" in message  # what is allowed
    assert "missing: kappa, alpha" in message


def test_source_name_prefixes_every_field():
    with pytest.raises(ScenarioError) as info:
        profile_from_csv(GOOD_HEADER + "0,0,1,0\n0.01,x,1,0\n", source_name="layer.right.profile")
    assert info.value.field == "layer.right.profile.sigma (line 3)"
    with pytest.raises(ScenarioError) as info:  # a check made by Profile itself
        profile_from_csv(GOOD_HEADER + "0,0,1,0\n0.01,1,0.5,0\n", source_name="layer.right.profile")
    assert info.value.field == "layer.right.profile.kappa"


def test_profile_result_is_a_profile_and_too_short_for_the_layer_is_caught_by_the_scenario():
    p = profile_from_csv(GOOD_HEADER + "0,0,1,0\n0.004,1,1,0\n")
    assert isinstance(p, Profile)
    with pytest.raises(ScenarioError) as info:
        default_scenario(Side(cells=10, profile=p))  # 10 mm layer, 4 mm table
    assert info.value.field.endswith("profile.depth")
    assert math.isclose(info.value.value, 0.004)

"""Layout files: loading the examples, validation messages, polygon helpers."""

import math
import textwrap

import numpy as np
import pytest

from mdrotor.electrodes import polygons as P
from mdrotor.electrodes.layout import Layout, load_layout, polygon, rectangle
from mdrotor.errors import InputError

CONFIGS = ["configs/electrodes/ring6_string2.toml", "configs/electrodes/ring8_triangle3.toml",
           "configs/electrodes/ring12_square4.toml"]


@pytest.mark.parametrize("path", CONFIGS)
def test_example_layouts_load(path):
    lay = load_layout(path)
    # a ring trap: the RF null lies on the symmetry axis (common practice, no
    # source), 50-150 um up; roundoff level off-axis
    x, y, z = lay.trap_point_m
    assert math.hypot(x, y) < 1e-9 * z
    assert 50e-6 < z < 150e-6
    d = lay.design
    assert d["order"] % d["ions"] == 0 and d["strength_si"] > 0
    assert all(l == 15.0 for l, r in zip(lay.channel_limits_v, lay.channel_roles) if r == "dc")
    assert lay.rf_channels == [0]
    # the electrodes tile a disc of the outer radius without gaps or overlaps
    # (arc vertices shared): total area equals the 96-gon's, 1e-12 relative
    r_out = 600e-6 if "square" in path or "string" in path else 650e-6
    area = sum(e.area_m2 for e in lay.electrodes)
    ngon = 0.5 * 96 * r_out ** 2 * math.sin(2 * math.pi / 96)
    assert area == pytest.approx(ngon, rel=1e-12)


def _write(tmp_path, text, name="bad.toml"):
    p = tmp_path / name
    p.write_text(textwrap.dedent(text))
    return p


HEAD = """
[layout]
units = "um"
[trap]
point = [0, 0, 80]
"""


def _expect(tmp_path, body, key, words, name="bad.toml"):
    p = _write(tmp_path, HEAD + textwrap.dedent(body), name)
    with pytest.raises(InputError) as exc:
        load_layout(p)
    msg = str(exc.value)
    # one line naming the file and the key
    assert "\n" not in msg
    assert msg.startswith(str(p) + ": " + key + ":"), msg
    for w in words:
        assert w in msg, msg
    return msg


def test_overlapping_electrodes_are_refused(tmp_path):
    _expect(tmp_path, """
        [[electrode]]
        name = "a"
        role = "dc"
        limit = "10 V"
        rect = { x = [0, 100], y = [0, 100] }
        [[electrode]]
        name = "b"
        role = "dc"
        limit = "10 V"
        rect = { x = [50, 150], y = [0, 100] }
        """, "electrode[1].rect", ["overlaps electrode 'a'", "5000 um^2"])


def test_touching_electrodes_are_accepted(tmp_path):
    p = _write(tmp_path, HEAD + """
        [[electrode]]
        name = "a"
        role = "dc"
        limit = "10 V"
        rect = { x = [0, 100], y = [0, 100] }
        [[electrode]]
        name = "b"
        role = "dc"
        limit = "10 V"
        polygon = [[100, 0], [150, 0], [150, 100], [100, 100], [100, 40]]
        """)
    lay = load_layout(p)
    assert lay.channels == ("a", "b")


def test_self_intersecting_polygon_is_refused(tmp_path):
    _expect(tmp_path, """
        [[electrode]]
        name = "bow"
        role = "dc"
        limit = "10 V"
        polygon = [[0, 0], [100, 100], [100, 0], [0, 100]]
        """, "electrode[0].polygon", ["not simple", "cross", "(50, 50) um"])


def test_missing_voltage_limit_is_refused(tmp_path):
    _expect(tmp_path, """
        [[electrode]]
        name = "a"
        role = "dc"
        rect = { x = [0, 100], y = [0, 100] }
        """, "electrode[0].limit", ["'a'", "voltage limit"])


def test_trap_point_below_surface_is_refused(tmp_path):
    p = _write(tmp_path, """
        [layout]
        units = "um"
        [trap]
        point = ["0 um", "0 um", "-5 um"]
        [[electrode]]
        name = "a"
        role = "dc"
        limit = "10 V"
        rect = { x = [0, 100], y = [0, 100] }
        """)
    with pytest.raises(InputError) as exc:
        load_layout(p)
    assert str(exc.value).startswith(f"{p}: trap.point: z = -5 um is at or below the trap plane")


@pytest.mark.parametrize("body, key, words", [
    ("""
     [[electrode]]
     name = "a"
     role = "dc"
     limit = "10 V"
     rect = { x = [0, 100], y = [0, 100] }
     colour = "red"
     """, "electrode[0].colour", ["unknown key"]),
    ("""
     [[electrode]]
     name = "a"
     role = "ground"
     limit = "10 V"
     rect = { x = [0, 100], y = [0, 100] }
     """, "electrode[0].role", ["'rf' or 'dc'"]),
    ("""
     [[electrode]]
     name = "a"
     role = "dc"
     limit = "10 mm"
     rect = { x = [0, 100], y = [0, 100] }
     """, "electrode[0].limit", ["voltage"]),
    ("""
     [[electrode]]
     name = "a"
     role = "dc"
     limit = "10 V"
     rect = { x = [0, 100], y = [0, 100] }
     [[electrode]]
     name = "a"
     role = "dc"
     limit = "10 V"
     rect = { x = [200, 300], y = [0, 100] }
     """, "electrode[1].name", ["used twice"]),
    ("""
     [[electrode]]
     name = "a"
     role = "dc"
     limit = "10 V"
     polygon = [[0, 0], [100, 0], [100, 100], [0, 100]]
     holes = [[[90, 90], [150, 90], [150, 95]]]
     """, "electrode[0].holes[0]", ["inside"]),
    ("""
     [[electrode]]
     name = "a"
     role = "dc"
     limit = "10 V"
     group = "g"
     rect = { x = [0, 100], y = [0, 100] }
     [[electrode]]
     name = "b"
     role = "rf"
     limit = "10 V"
     group = "g"
     rect = { x = [100, 200], y = [0, 100] }
     """, "electrode[1].group", ["mixes roles"]),
    ("""
     [[electrode]]
     name = "a"
     role = "dc"
     limit = "10 V"
     rect = { x = ["0 um", 100], y = [0, 100] }
     sector = { r_inner = 1, r_outer = 2, start = "0 deg", stop = "10 deg" }
     """, "electrode[0]", ["exactly one shape"]),
    ("""
     [[segments]]
     name = "s"
     count = 4
     role = "dc"
     limit = "10 V"
     r_inner = 10
     r_outer = 20
     offset = 15
     """, "segments[0].offset", ["'30 deg'"]),
    ("""
     [design]
     ions = 3
     order = 4
     [[electrode]]
     name = "a"
     role = "dc"
     limit = "10 V"
     rect = { x = [0, 100], y = [0, 100] }
     """, "design.order", ["multiple of 3"]),
])
def test_other_faults_name_key(tmp_path, body, key, words):
    _expect(tmp_path, body, key, words)


def test_arc_segments_bounded(tmp_path):
    """arc_segments = 100000 ended in a traceback (a 37 GiB array in the
    overlap check, whose cost grows with the square of the vertices);
    1024 takes half a minute for a six-segment ring, 4096 over four."""
    body = """
     [[electrode]]
     name = "a"
     role = "dc"
     limit = "10 V"
     disc = { center = [0, 0], radius = 100 }
     """
    for arc in (100000, 2000, 4):
        p = _write(tmp_path, HEAD.replace('units = "um"', f'units = "um"\narc_segments = {arc}') + textwrap.dedent(body))
        with pytest.raises(InputError) as exc:
            load_layout(p)
        assert "layout.arc_segments" in str(exc.value) and "8 to 1024" in str(exc.value)


def test_bad_toml_and_missing_file(tmp_path):
    p = _write(tmp_path, "[layout\nunits = 'um'\n")
    with pytest.raises(InputError, match=r"not valid TOML"):
        load_layout(p)
    with pytest.raises(InputError, match=r"cannot read layout file"):
        load_layout(tmp_path / "missing.toml")


def test_bare_numbers_need_units(tmp_path):
    p = _write(tmp_path, """
        [trap]
        point = ["0 um", "0 um", "80 um"]
        [[electrode]]
        name = "a"
        role = "dc"
        limit = "10 V"
        rect = { x = [0, 100], y = ["0 um", "100 um"] }
        """)
    with pytest.raises(InputError, match=r"electrode\[0\]\.rect\.x\[0\]: expected a length"):
        load_layout(p)


def test_rf_null_without_rf_electrode_is_refused(tmp_path):
    p = _write(tmp_path, """
        [layout]
        units = "um"
        [[electrode]]
        name = "a"
        role = "dc"
        limit = "10 V"
        rect = { x = [0, 100], y = [0, 100] }
        """)
    with pytest.raises(InputError, match=r"trap\.point: 'rf_null' needs at least one electrode with role = 'rf'"):
        load_layout(p)


def test_groups_make_channels():
    els = [rectangle("a", (0, 1e-4), (0, 1e-4), limit_v=10, group="pair"),
           rectangle("b", (2e-4, 3e-4), (0, 1e-4), limit_v=8, group="pair"),
           rectangle("c", (4e-4, 5e-4), (0, 1e-4), limit_v=10)]
    lay = Layout(els, [0, 0, 1e-4])
    assert lay.channels == ("pair", "c")
    # a group's limit is its members' smallest
    assert list(lay.channel_limits_v) == [8.0, 10.0]
    pts = np.array([[1e-4, 5e-5, 5e-5]])
    np.testing.assert_allclose(lay.channel_basis(pts)[:, 0], lay.electrode_basis(pts)[:, :2].sum(axis=1), rtol=1e-15)


# -- polygon helpers -----------------------------------------------------------

def test_triangulation_covers_nonconvex_polygon_once():
    # shoelace area (Gauss's area formula; common practice, no source) equals
    # the sum of the ear-clipped triangles, each counter-clockwise
    v = np.array([[0, 0], [4, 0], [4, 3], [3, 1], [2, 3], [1, 1], [0, 3]], dtype=float)
    tris = P.triangulate(v)
    assert len(tris) == len(v) - 2
    areas = [P.signed_area(t) for t in tris]
    assert min(areas) > 0
    assert sum(areas) == pytest.approx(P.signed_area(v), rel=1e-14)
    # no two triangles overlap
    i, j = np.triu_indices(len(tris), 1)
    assert np.max(P.triangle_overlap_areas(tris[i], tris[j])) < 1e-12


def test_self_intersection_cases():
    assert P.self_intersection(np.array([[0, 0], [1, 0], [1, 1], [0, 1]], dtype=float)) is None
    bow = P.self_intersection(np.array([[0, 0], [1, 1], [1, 0], [0, 1]], dtype=float))
    assert bow[3] == "cross" and np.allclose(bow[2], [0.5, 0.5])
    touch = P.self_intersection(np.array([[0, 0], [2, 0], [2, 2], [1, 0], [0, 2]], dtype=float))
    assert touch is not None and touch[3] == "touch"
    assert P.self_intersection(np.array([[0, 0], [1, 0], [1, 0], [0, 1]], dtype=float))[3] == "repeated vertex"


def test_triangle_overlap_area_known_case():
    # two unit right triangles sharing the hypotenuse region: the square
    # [0,1]^2 cut along both diagonals, overlap = quarter of the square
    a = np.array([[[0, 0], [1, 0], [0, 1]]], dtype=float)
    b = np.array([[[0, 0], [1, 0], [1, 1]]], dtype=float)
    assert P.triangle_overlap_areas(a, b)[0] == pytest.approx(0.25, rel=1e-14)


def test_polygon_with_hole_potential():
    # hole subtracts: a square with a square hole equals outer minus inner
    # (additivity, common practice, no source)
    outer = np.array([[-1, -1], [1, -1], [1, 1], [-1, 1]], dtype=float) * 1e-4
    inner = outer * 0.3
    ring = Layout([polygon("r", outer, holes_m=[inner], limit_v=1)], None)
    full = Layout([polygon("o", outer, limit_v=1)], None)
    hole = Layout([polygon("h", inner, limit_v=1)], None)
    pts = np.array([[0, 0, 5e-5], [2e-5, 1e-5, 1e-6], [3e-4, 0, 1e-4]])
    np.testing.assert_allclose(ring.potential(pts, [1.0]), full.potential(pts, [1.0]) - hole.potential(pts, [1.0]),
                               rtol=0, atol=1e-14)

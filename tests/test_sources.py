"""Applied field sources against analytic electrostatics (sources named beside each check)."""
import math

import numpy as np
import pytest

from chargesim import hazards
from chargesim.physics.constants import EPSILON_0 as EPS0
from chargesim.sources import (
    FieldSource,
    GriddedField,
    ParallelPlates,
    Superposition,
    UniformField,
    WireInTube,
    WirePlateChannel,
)


def _grad_check(src, pts, h=1e-6):
    """-grad(phi) by central differences, to check field against potential."""
    out = np.empty_like(pts)
    for k in range(3):
        dp = np.zeros(3)
        dp[k] = h
        out[:, k] = -(src.potential(pts + dp) - src.potential(pts - dp)) / (2 * h)
    return out


def test_uniform_field():
    src = UniformField([0.0, 2e5, 0.0], reference_point=[0.0, 1.0, 0.0])
    pts = np.array([[0.0, 0.0, 0.0], [3.0, 2.0, -1.0]])
    np.testing.assert_array_equal(src.field(pts), [[0, 2e5, 0], [0, 2e5, 0]])
    np.testing.assert_allclose(src.potential(pts), [2e5, -2e5])  # phi = -E.(x - x0)
    assert src.peak_field() == 2e5
    assert isinstance(src, FieldSource) and src.describe()["kind"] == "UniformField"
    # an oblique field at many points (the compiled pass): phi = -E.(x - x0), by definition
    e, x0 = np.array([1.1e5, -2.3e4, 7.7e3]), np.array([0.1, -0.2, 0.3])
    pts = np.random.default_rng(2).uniform(-1.0, 2.0, (1000, 3))
    np.testing.assert_allclose(UniformField(e, reference_point=x0).potential(pts), -(pts - x0) @ e,
                               rtol=1e-12, atol=1e-9)


def test_parallel_plates_V_over_d():
    # standard relations: E = V/d between ideal parallel plates
    src = ParallelPlates("x", positions=(0.0, 0.05), potentials=(0.0, 30e3))
    pts = np.array([[0.01, 0.3, -2.0], [0.04, 0.0, 0.0], [0.2, 0.0, 0.0]])
    e = src.field(pts)
    np.testing.assert_allclose(e[:2], [[-30e3 / 0.05, 0, 0]] * 2, rtol=1e-14)
    np.testing.assert_array_equal(e[2], [0, 0, 0])  # outside: no field
    np.testing.assert_allclose(src.potential(pts), [6e3, 24e3, 30e3], rtol=1e-14)
    assert src.peak_field() == pytest.approx(6e5)
    # an electrode at a fixed potential sets V/d whatever the medium: no eps_r
    # enters a source, and the safety check sees the gap field
    assert [f.kind for f in hazards.assess(fields=[src])] == []
    hot = ParallelPlates(2, positions=(0.01, 0.0), potentials=(35e3, 0.0), name="hot gap")
    assert hot.peak_field() == pytest.approx(3.5e6)
    assert [f.kind for f in hazards.assess(fields=[hot])] == ["breakdown"]
    # plates are not corona electrodes: their gap field itself is checked against breakdown
    assert src.corona_wire_radius is None and hot.corona_wire_radius is None
    assert "peak field 3.5 MV/m" in hazards.assess(fields=[hot])[0].message


def test_wire_in_tube_against_analytic_field():
    # standard electrostatics: E(r) = V/(r ln(b/a)), phi(r) = V ln(b/r)/ln(b/a)
    v, a, b = -30e3, 1e-3, 0.1
    axis = np.array([1.0, 1.0, 0.0]) / math.sqrt(2)
    origin = np.array([0.2, -0.1, 0.5])
    src = WireInTube(v, a, b, origin=origin, axis=axis)
    rng = np.random.default_rng(7)
    r = rng.uniform(a, b, 50)
    t = rng.uniform(0, 2 * math.pi, 50)
    along = rng.uniform(-1, 1, 50)
    e1 = np.array([0.0, 0.0, 1.0])
    e2 = np.cross(axis, e1)
    radial = np.cos(t)[:, None] * e1 + np.sin(t)[:, None] * e2
    pts = origin + along[:, None] * axis + r[:, None] * radial
    e = src.field(pts)
    np.testing.assert_allclose(e, (v / (r * math.log(b / a)))[:, None] * radial, rtol=1e-12, atol=1e-9)
    np.testing.assert_allclose(src.potential(pts), v * np.log(b / r) / math.log(b / a), rtol=1e-12)
    # potential difference wire to tube is V; the tube wall is at 0 V
    wall = origin + b * radial[:3]
    wire = origin + a * radial[:3]
    np.testing.assert_allclose(src.potential(wire) - src.potential(wall), v, rtol=1e-14)
    assert src.peak_field() == pytest.approx(abs(v) / (a * math.log(b / a)), rel=1e-14)
    np.testing.assert_allclose(src.field(pts[:5]), _grad_check(src, pts[:5]), rtol=1e-5)
    # Gauss's law: the wire's free charge per length is 2 pi eps0 V/ln(b/a)
    assert src.line_charge() == pytest.approx(2 * math.pi * EPS0 * v / math.log(b / a))


def _image_series_potential(pts, wires_y, lam, s, terms=4000):
    """Line charges and their alternating image series across the plates, summed directly.

    Method of images (standard electrostatics): a line charge lambda at (0, y_j)
    between grounded plates x = +-s has images (-1)^m lambda at (2 m s, y_j); the
    series is summed in symmetric +-m pairs and truncated far out.
    """
    m = np.arange(-terms, terms + 1)
    sign = np.where(m % 2 == 0, 1.0, -1.0)
    phi = np.zeros(len(pts))
    for yj, lj in zip(wires_y, lam):
        dx = pts[:, 0][:, None] - 2 * s * m[None, :]
        dy = (pts[:, 1] - yj)[:, None]
        # reference each term to the distance of the plate x = s, where phi = 0 exactly
        ref = (s - 2 * s * m[None, :]) ** 2 + dy**2
        phi += -lj / (4 * math.pi * EPS0) * np.sum(sign * np.log((dx**2 + dy**2) / ref), axis=1)
    return phi


def test_wire_plate_channel_matches_direct_image_series():
    v, a, s, sp = -45e3, 1.5e-3, 0.15, 0.25
    src = WirePlateChannel(v, a, s, sp, n_wires=4, origin=(0.0, 0.0, 0.0))
    rng = np.random.default_rng(3)
    pts = np.column_stack([rng.uniform(-0.14, 0.14, 40), rng.uniform(-0.3, 1.1, 40), rng.uniform(-1, 1, 40)])
    pts = pts[np.min(np.hypot(pts[:, 0, None], pts[:, 1, None] - src.wire_y[None, :]), axis=1) > 0.01]
    direct = _image_series_potential(pts, src.wire_y, src.line_charge(), s)
    np.testing.assert_allclose(src.potential(pts), direct, rtol=1e-5, atol=1e-4 * abs(v))
    np.testing.assert_allclose(src.field(pts), _grad_check(src, pts), rtol=1e-5, atol=1e-3)


def test_wire_plate_channel_wire_at_V_plates_at_zero_and_symmetric():
    v, a, s, sp = -40e3, 1e-3, 0.15, 0.2
    src = WirePlateChannel(v, a, s, sp, n_wires=5, origin=(0.3, 1.0, 0.0))
    t = np.linspace(0, 2 * math.pi, 64, endpoint=False)
    for yw in src.wire_y:
        ring = np.column_stack([0.3 + a * 1.0000001 * np.cos(t), yw + a * 1.0000001 * np.sin(t), np.zeros_like(t)])
        # thin-wire model: the surface sits at V to order (a/s)^2 and (a/spacing)^2
        np.testing.assert_allclose(src.potential(ring), v, rtol=1e-3)
    y = np.linspace(0.5, 2.3, 37)
    for xp in (0.3 - s, 0.3 + s):
        plate = np.column_stack([np.full_like(y, xp), y, np.zeros_like(y)])
        np.testing.assert_allclose(src.potential(plate), 0.0, atol=1e-9 * abs(v))
    # mirror symmetry about the centre plane and about the middle wire
    p = np.array([[0.3 + 0.07, 1.13, 0.0]])
    mx = np.array([[0.3 - 0.07, 1.13, 0.0]])
    my = np.array([[0.3 + 0.07, 2 * src.wire_y[2] - 1.13, 0.0]])
    e, ex, ey = src.field(p)[0], src.field(mx)[0], src.field(my)[0]
    np.testing.assert_allclose([ex[0], ex[1]], [-e[0], e[1]], rtol=1e-12)
    np.testing.assert_allclose([ey[0], ey[1]], [e[0], -e[1]], rtol=1e-12)
    assert np.all(src.field(p)[:, 2] == 0)
    # the end wires carry more charge than the inner ones (fewer neighbours)
    lam = src.line_charge()
    assert abs(lam[0]) > abs(lam[2]) and lam[0] == pytest.approx(lam[-1], rel=1e-12)
    # inside a wire: its potential, no field; behind the plates: nothing
    inside = np.array([[0.3, src.wire_y[1] + 0.5 * a, 0.0], [0.3 + s + 0.01, 1.0, 0.0]])
    np.testing.assert_allclose(src.potential(inside), [v, 0.0])
    np.testing.assert_array_equal(src.field(inside), 0.0)


def test_single_wire_between_plates_charge():
    # a thin wire midway between grounded planes 2s apart: lambda = 2 pi eps0 V/ln(4 s/(pi a))
    # (standard electrostatics, from the image series; from memory)
    v, a, s = 30e3, 1e-3, 0.125
    src = WirePlateChannel(v, a, s, 0.3, n_wires=1)
    assert src.line_charge()[0] == pytest.approx(2 * math.pi * EPS0 * v / math.log(4 * s / (math.pi * a)), rel=1e-12)
    # the surface field of a thin wire is about lambda/(2 pi eps0 a)
    assert src.peak_field() == pytest.approx(src.line_charge()[0] / (2 * math.pi * EPS0 * a), rel=2e-2)


def test_corona_wires_checked_for_onset_and_sparkover():
    # wire-plate channel: wire surface field against Peek's onset field (Peek 1929, from memory), the mean
    # field V/s against 3 MV/m x relative gas density (common practice) for sparkover
    v, a, s = -22e3, 0.5e-3, 0.01
    src = WirePlateChannel(v, a, s, 0.05, n_wires=3, name="tight channel")
    assert src.corona_wire_radius == a and src.gap_field() == pytest.approx(22e3 / 0.01)
    assert src.peak_field() > hazards.corona_onset_field(a)
    # 2.2 MV/m at 20 degC, 1 atm: below 80 % of 3 MV/m, corona but no sparkover finding
    assert [f.kind for f in hazards.assess(fields=[src])] == ["corona_onset"]
    # at 150 degC the gas density is 293.15/423.15 of that at 20 degC: breakdown at 2.08 MV/m < 2.2 MV/m
    hot = hazards.assess(fields=[src], temperature=423.15)
    assert [f.kind for f in hot] == ["corona_onset", "breakdown"]
    assert hot[1].value == pytest.approx(2.2e6) and hot[1].threshold == pytest.approx(3e6 * 293.15 / 423.15)
    assert "sparkover" in hot[1].message and hot[1].name == "tight channel"
    # 35 kV over 10 mm: 3.5 MV/m exceeds 3 MV/m at 20 degC, 1 atm
    over = WirePlateChannel(35e3, a, s, 0.05, n_wires=3)
    assert [f.kind for f in hazards.assess(fields=[over])] == ["corona_onset", "breakdown"]
    # a wire in a tube at 5 kV: surface field V/(a ln(b/a)) = 1.09 MV/m, below onset (6.1 MV/m): no corona
    tube = WireInTube(5e3, 1e-3, 0.1)
    assert tube.corona_wire_radius == 1e-3 and tube.gap_field() == pytest.approx(5e3 / 0.1)
    low = hazards.assess(fields=[tube])
    assert [f.kind for f in low] == ["no_corona"] and low[0].severity == "info"
    assert low[0].value == pytest.approx(5e3 / (1e-3 * math.log(100.0)))
    assert low[0].threshold == pytest.approx(3.1e6 * (1 + 0.0308 / math.sqrt(1e-3)))


def test_periodic_row_equals_long_finite_row_in_the_middle():
    v, a, s, sp = -40e3, 1e-3, 0.15, 0.2
    per = WirePlateChannel(v, a, s, sp, periodic=True)
    long = WirePlateChannel(v, a, s, sp, n_wires=41, origin=(0.0, -20 * sp, 0.0))
    pts = np.column_stack([np.linspace(-0.14, 0.14, 9), np.linspace(0.01, 0.19, 9), np.zeros(9)])
    np.testing.assert_allclose(per.field(pts), long.field(pts), rtol=1e-9, atol=1e-4)  # V/m; rounding at symmetric points
    np.testing.assert_allclose(per.potential(pts), long.potential(pts), rtol=1e-9)
    np.testing.assert_allclose(per.field(pts + [0, 7 * sp, 0]), per.field(pts), rtol=1e-9, atol=1e-4)
    assert per.line_charge()[0] == pytest.approx(long.line_charge()[20], rel=1e-9)


def test_gridded_field_exact_for_linear_field():
    # trilinear interpolation reproduces a linear field exactly (numerical analysis)
    origin = np.array([-0.1, 0.0, 0.2])
    spacing = np.array([0.02, 0.05, 0.04])
    n = (6, 5, 4)
    grid = np.stack(np.meshgrid(*[origin[k] + spacing[k] * np.arange(n[k]) for k in range(3)], indexing="ij"), axis=-1)
    a_mat = np.array([[1e5, 2e4, -3e4], [0.0, -5e4, 1e4], [7e3, 0.0, 2e5]])
    e0 = np.array([1e3, -2e3, 5e2])
    field = grid @ a_mat.T + e0
    pot = grid @ np.array([1.0, 2.0, 3.0]) * 1e3 + 5.0
    src = GriddedField(origin, spacing, field, potential=pot)
    rng = np.random.default_rng(1)
    hi = origin + spacing * (np.array(n) - 1)
    pts = rng.uniform(origin, hi, size=(200, 3))
    pts = np.vstack([pts, origin, hi])  # the corner nodes count as inside
    np.testing.assert_allclose(src.field(pts), pts @ a_mat.T + e0, rtol=1e-12, atol=1e-7)
    np.testing.assert_allclose(src.potential(pts), pts @ np.array([1.0, 2.0, 3.0]) * 1e3 + 5.0, rtol=1e-12)
    assert src.peak_field() == pytest.approx(np.linalg.norm(field, axis=-1).max())
    with pytest.raises(ValueError, match=r"points\[1\].*outside the grid"):
        src.field(np.array([[0.0, 0.1, 0.25], [0.0, 0.1, 0.1]]))
    with pytest.raises(ValueError, match="shape"):
        GriddedField(origin, spacing, field[..., :2])
    with pytest.raises(ValueError, match="without a potential"):
        GriddedField(origin, spacing, field).potential(pts[:1])


def test_superposition_adds():
    a = UniformField([1e4, 0, 0])
    b = WireInTube(1e4, 1e-3, 0.05)
    both = Superposition([a, b])
    pts = np.array([[0.01, 0.02, 0.0], [0.03, 0.0, 1.0]])
    np.testing.assert_allclose(both.field(pts), a.field(pts) + b.field(pts), rtol=1e-15)
    np.testing.assert_allclose(both.potential(pts), a.potential(pts) + b.potential(pts), rtol=1e-15)
    assert len(both.describe()["outlines"]) == 2


def test_describe_has_outlines():
    d = WirePlateChannel(-40e3, 1e-3, 0.15, 0.2, n_wires=3, length=2.0).describe()
    assert d["kind"] == "WirePlateChannel" and d["name"] == "wire-plate channel"
    shapes = [o["shape"] for o in d["outlines"]]
    assert shapes.count("cylinder") == 3 and shapes.count("box") == 2
    assert ParallelPlates(0, (0, 1), (0, 1)).describe()["parameters"]["gap"] == 1.0


@pytest.mark.parametrize(
    "make, name",
    [
        (lambda: WireInTube(1e4, 0.1, 0.05), "tube_radius"),
        (lambda: WireInTube(1e4, -1e-3, 0.05), "wire_radius"),
        (lambda: ParallelPlates("w", (0, 1), (0, 1)), "axis"),
        (lambda: ParallelPlates(0, (1, 1), (0, 1)), "positions"),
        (lambda: WirePlateChannel(1e4, 1e-3, 0.1, 0.001, n_wires=3), "wire_spacing"),
        (lambda: WirePlateChannel(1e4, 1e-3, 0.1, 0.2, n_wires=0), "n_wires"),
        (lambda: UniformField([1, 2]), "field"),
        (lambda: UniformField([1, 2, 3]).field(np.zeros((2, 2))), "points"),
    ],
)
def test_validation(make, name):
    with pytest.raises(ValueError, match=name):
        make()


def test_wire_plate_threaded_path_matches_serial_path():
    from chargesim.sources import wires

    src = WirePlateChannel(-40e3, 1e-3, 0.15, 0.2, n_wires=6)
    n = wires.PARALLEL_THRESHOLD + 7
    rng = np.random.default_rng(9)
    pts = np.column_stack([rng.uniform(-0.15, 0.15, n), rng.uniform(-0.2, 1.3, n), np.zeros(n)])
    half = n // 2
    np.testing.assert_array_equal(src.field(pts), np.vstack([src.field(pts[:half]), src.field(pts[half:])]))
    np.testing.assert_array_equal(src.potential(pts),
                                  np.concatenate([src.potential(pts[:half]), src.potential(pts[half:])]))

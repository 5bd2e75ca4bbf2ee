"""Linked-cell neighbour search against scipy.spatial.cKDTree.query_pairs.

Reference: scipy.spatial.cKDTree (general-purpose reference library), whose
``query_pairs`` returns every pair within the distance, with ``boxsize=`` for
periodic (minimum-image) distances.
"""
import numpy as np
import pytest
from scipy.spatial import cKDTree

import chargesim
from chargesim.coulomb import cells


def _reference(points, cutoff, box=None):
    """Pairs (i, j), i < j, from cKDTree, sorted by i then j."""
    if box is None:
        tree = cKDTree(points)
    else:
        tree = cKDTree(np.mod(points, box), boxsize=box)
    p = tree.query_pairs(cutoff, output_type="ndarray").astype(np.int64)
    p = p[np.lexsort((p[:, 1], p[:, 0]))]
    return p[:, 0], p[:, 1]


def _clustered(rng, n, centres, spread, box=None):
    c = rng.random((centres, 3)) * (1.0 if box is None else box)
    pick = rng.integers(0, centres, n)
    return c[pick] + rng.normal(scale=spread, size=(n, 3))


def _check(points, cutoff, box=None):
    i, j = chargesim.neighbors(points, cutoff, box=box)
    ri, rj = _reference(points, cutoff, box)
    assert i.dtype == np.int64 and j.dtype == np.int64
    assert np.all(i < j)
    np.testing.assert_array_equal(i, ri)
    np.testing.assert_array_equal(j, rj)
    return i.size


@pytest.mark.parametrize("cutoff", [0.03, 0.1, 0.35])
def test_random_open_matches_ckdtree(cutoff):
    # scipy.spatial.cKDTree.query_pairs (general-purpose reference library)
    rng = np.random.default_rng(11)
    pts = rng.random((3000, 3)) * np.array([1.0, 0.7, 0.4])
    assert _check(pts, cutoff) > 0


def test_clustered_open_matches_ckdtree():
    # scipy.spatial.cKDTree.query_pairs (general-purpose reference library);
    # dense clusters put hundreds of points in one cell, the rest is empty
    rng = np.random.default_rng(12)
    pts = _clustered(rng, 4000, 6, 0.01)
    assert _check(pts, 0.02) > 0
    # a few points spread far wider than the cutoff: the cell count is capped
    far = np.concatenate([pts[:50], rng.random((50, 3)) * 1e6])
    _check(far, 0.02)


@pytest.mark.parametrize("box", [np.array([1.0, 1.0, 1.0]), np.array([1.0, 0.6, 0.3])])
@pytest.mark.parametrize("cutoff", [0.05, 0.14999])
def test_random_periodic_matches_ckdtree(box, cutoff):
    # scipy.spatial.cKDTree(boxsize=).query_pairs (general-purpose reference library)
    rng = np.random.default_rng(13)
    # points up to one box outside on each side: they are wrapped
    pts = rng.random((3000, 3)) * 3 * box - box
    assert _check(pts, cutoff, box) > 0


def test_periodic_small_grid_and_half_box_cutoff():
    # scipy.spatial.cKDTree(boxsize=) (general-purpose reference library): a
    # cutoff near half the box leaves fewer than 2*reach+1 cells per axis, so
    # neighbour cells are visited several times with different image shifts
    rng = np.random.default_rng(14)
    box = np.array([1.0, 2.0, 1.5])
    pts = rng.random((600, 3)) * box
    assert _check(pts, 0.4999, box) > 0


def test_clustered_periodic_matches_ckdtree():
    # scipy.spatial.cKDTree(boxsize=) (general-purpose reference library);
    # clusters straddle the box faces
    rng = np.random.default_rng(15)
    box = np.array([1.0, 1.0, 0.5])
    pts = _clustered(rng, 3000, 5, 0.03, box)
    pts[:5] = 0.0  # on the corner, and shared with its images
    assert _check(pts, 0.05, box) > 0


def test_empty_and_single():
    # no pairs exist among fewer than two points (analytic)
    for pts in (np.zeros((0, 3)), np.array([[0.1, 0.2, 0.3]])):
        for box in (None, np.ones(3)):
            i, j = chargesim.neighbors(pts, 0.3, box=box)
            assert i.shape == (0,) and j.shape == (0,)
            assert i.dtype == np.int64 and j.dtype == np.int64


def test_cutoff_above_half_box_is_refused():
    # minimum image holds only for cutoff <= box/2 (common practice)
    with pytest.raises(ValueError, match="half the smallest box edge"):
        chargesim.neighbors(np.zeros((2, 3)), 0.6, box=[1.0, 2.0, 2.0])


def test_grid_sorted_by_cell():
    # the grid invariants the Ewald real-space sum relies on: order is a
    # permutation, slots of cell c hold exactly the points inside cell c
    rng = np.random.default_rng(16)
    box = np.array([1.0, 0.8, 0.6])
    pts = rng.random((500, 3)) * box * 2 - 0.5 * box
    g = cells.build(pts, 0.1, box)
    np.testing.assert_array_equal(np.sort(g.order), np.arange(500))
    np.testing.assert_allclose(g.points.T, np.mod(pts[g.order], box), rtol=0, atol=1e-15)
    assert np.all(g.width * g.reach >= 0.1) and np.all(g.shape * g.width <= box * (1 + 1e-12))
    k = np.minimum((g.points.T // g.width).astype(np.int64), g.shape - 1)
    cell = (k[:, 0] * g.shape[1] + k[:, 1]) * g.shape[2] + k[:, 2]
    assert np.all(np.diff(cell) >= 0)
    np.testing.assert_array_equal(g.start, np.searchsorted(cell, np.arange(g.start.size)))

"""Frames made from the two captures that bracket them (models.pairs): brackets on hand-made
banks, flow warping of known motions, and the synthesis of a frame between real photographs."""
import numpy as np
import pytest
from PIL import Image
from scipy import ndimage

from geotween.models import flow as lflow
from geotween.models import pairs as lpairs
from geotween.models.refine import blur

skdata = pytest.importorskip("skimage.data")
skmetrics = pytest.importorskip("skimage.metrics")


def ssim(a, b):
    # scikit-image's structural_similarity with the Gaussian window of Wang et al. 2004 (sigma 1.5)
    return skmetrics.structural_similarity(a, b, channel_axis=2, data_range=1.0, gaussian_weights=True, sigma=1.5,
                                           use_sample_covariance=False)


@pytest.fixture(scope="module")
def coffee():
    # scikit-image's "coffee" photograph, which ships inside the scikit-image wheel
    return skdata.coffee()


def window(photo, x, y=100, side=192, size=64):
    """A side x side window of the photo at (x, y), fractional x allowed, resampled to size px (Lanczos)."""
    img = Image.fromarray(photo).resize((size, size), Image.Resampling.LANCZOS, box=(x, y, x + side, y + side))
    return np.asarray(img, dtype=np.float32) / 255.0


# -- brackets ---------------------------------------------------------------------------------
def grid_bank(nx=8, ny=5, period=8.0):
    """Settings in spacing units on an nx x ny grid, the first axis periodic with `period`."""
    x, y = np.meshgrid(np.arange(nx, dtype=float), np.arange(ny, dtype=float), indexing="ij")
    u = np.stack([x.ravel(), y.ravel()], axis=-1)
    box = np.array([period, 4.0 * ny + 1.0])
    return u, box


def index(u, x, y):
    return int(np.nonzero((u[:, 0] == x) & (u[:, 1] == y))[0][0])


def test_bracket_of_a_frame_on_a_grid_edge_is_the_two_captures_around_it():
    u, box = grid_bank()
    b = lpairs.Bracketer(u, box)([[2.25, 3.0], [4.0, 1.6]])
    assert {int(b.first[0]), int(b.second[0])} == {index(u, 2, 3), index(u, 3, 3)}
    at = b.at[0] if b.first[0] == index(u, 2, 3) else 1 - b.at[0]
    assert at == pytest.approx(0.25) and b.length[0] == pytest.approx(1.0) and b.off[0] == pytest.approx(0.0)
    assert {int(b.first[1]), int(b.second[1])} == {index(u, 4, 1), index(u, 4, 2)}
    assert b.off[1] == pytest.approx(0.0)


def test_bracket_wraps_across_the_periodic_seam():
    u, box = grid_bank()
    b = lpairs.Bracketer(u, box)([[7.5, 2.0]])  # halfway between x = 7 and x = 8 == 0
    assert {int(b.first[0]), int(b.second[0])} == {index(u, 7, 2), index(u, 0, 2)}
    assert b.at[0] == pytest.approx(0.5) and b.length[0] == pytest.approx(1.0)


def test_a_frame_at_a_capture_is_that_capture_and_nowhere_else_a_single_one():
    u, box = grid_bank()
    br = lpairs.Bracketer(u, box)
    at = br([[3.0, 2.0]])
    assert at.first[0] == at.second[0] == index(u, 3, 2) and at.length[0] == 0.0
    # 0.3 spacings off a capture, inside a cell: a pair passes closer than any capture stands
    near = br([[3.3, 2.3]])
    assert near.first[0] != near.second[0] and near.off[0] < 0.3 - 1e-9


def test_a_missing_capture_is_bridged_by_the_pair_around_its_gap():
    u, box = grid_bank()
    u = np.delete(u, index(u, 3, 2), axis=0)
    b = lpairs.Bracketer(u, box)([[3.0, 2.0]])
    assert {tuple(u[b.first[0]]), tuple(u[b.second[0]])} in ({(2.0, 2.0), (4.0, 2.0)}, {(3.0, 1.0), (3.0, 3.0)})
    assert b.at[0] == pytest.approx(0.5) and b.length[0] == pytest.approx(2.0) and b.off[0] == pytest.approx(0.0)


def test_worse_ranks_give_other_brackets_that_cost_more():
    u, box = grid_bank()
    br = lpairs.Bracketer(u, box)
    p = [[2.4, 1.7]]
    seen, costs = [], []
    for rank in range(3):
        b = br(p, rank)
        seen.append((tuple(b.members[0]), tuple(np.round(b.weights[0], 9))))
        costs.append(b.off[0] + lpairs.LENGTH_COST * b.length[0])
    assert len(set(seen)) == 3 and costs == sorted(costs)


# -- flow warping of known motions --------------------------------------------------------------
def test_warping_along_flow_undoes_a_known_rotation(coffee):
    # reference: scipy.ndimage.rotate (bilinear); a 4 deg turn about the centre of a 96 px crop
    big = coffee[120:216, 160:256].astype(np.float32) / 255.0
    turned = np.clip(ndimage.rotate(big, 4.0, reshape=False, order=1, mode="nearest"), 0, 1)
    a, b = big[16:80, 16:80], turned[16:80, 16:80]
    back = lflow.warp(b, lflow.flow(a, b, method="dis"))  # warp(b, flow(a, b)) ~ a
    inner = (slice(6, -6), slice(6, -6))
    assert ssim(back[inner], a[inner]) > 0.9 > ssim(b[inner], a[inner])
    # where the pixels land: the estimated flow matches the rotation's own displacement within a pixel
    f = lflow.flow(a, b, method="dis")
    h = 64
    yy, xx = np.mgrid[0:h, 0:h].astype(np.float64) + 16 - 47.5  # about the 96 px crop's centre
    th = np.deg2rad(4.0)
    # ndimage.rotate turns content by +angle in the (row, column) plane: b(x) = a(R^-1 x)
    src_x = np.cos(th) * xx - np.sin(th) * yy
    src_y = np.sin(th) * xx + np.cos(th) * yy
    want = np.stack([xx - src_x, yy - src_y], axis=-1)  # a(x) = b(x + f(x)): f = R x - x
    err = np.hypot(*(f[inner] - want[inner]).transpose(2, 0, 1))
    if np.median(err) > 1.0:  # the other sense of the same turn
        want = np.stack([src_x - xx, src_y - yy], axis=-1)
        err = np.hypot(*(f[inner] - want[inner]).transpose(2, 0, 1))
    assert np.median(err) < 1.0


@pytest.mark.parametrize("shift", [6.0, 12.0, 18.0])  # photo px; a third of that at 64 px
def test_a_frame_halfway_between_two_shifted_crops_is_the_true_crop(coffee, shift):
    a, b, mid = window(coffee, 100.0), window(coffee, 100.0 + shift), window(coffee, 100.0 + shift / 2)
    decoded = blur(mid[None], 2.0)[0]  # what a small decoder gives: the right picture, blurred
    out, fig = lpairs.blend(a, b, 0.5, decoded, lpairs.pair_flows(a, b), 0.05)
    assert ssim(out, mid) >= 0.95
    assert ssim(out, mid) > ssim(0.5 * a + 0.5 * b, mid) and ssim(out, mid) > ssim(decoded, mid)
    assert 0.9 <= fig["detail"] <= 1.0 and 0.0 <= fig["flow_error"] < 0.2


def test_where_the_captures_disagree_the_decoded_frame_picks_the_capture_to_believe(coffee):
    # two "captures" of one view, one with a patch relit: where they disagree, the one that agrees
    # with the decoded frame wins (no motion, so no flow can explain the difference)
    a = window(coffee, 100.0)
    b = a.copy()
    b[20:40, 20:40] = np.clip(b[20:40, 20:40] + 0.4, 0, 1)
    flows = lpairs.pair_flows(a, a)
    out, fig = lpairs.blend(a, b, 0.5, a, flows, 0.05)
    assert np.abs(out[24:36, 24:36] - a[24:36, 24:36]).mean() < 0.05
    assert fig["detail"] < 0.95  # the disagreeing patch is not counted as agreed
    out_b, _ = lpairs.blend(a, b, 0.5, b, flows, 0.05)
    assert np.abs(out_b[24:36, 24:36] - b[24:36, 24:36]).mean() < 0.05


def test_synthesize_estimates_each_pair_once_and_uses_captures_whole_at_their_settings(coffee):
    caps = np.stack([window(coffee, 100.0 + 6 * i) for i in range(3)])
    calls = []

    def captures(idx):
        calls.append(tuple(np.ravel(idx)))
        return caps[np.asarray(idx)]

    br = lpairs.Bracket(members=np.array([[0, 1, 1], [0, 1, 1], [1, 2, 2], [2, 2, 2]]),
                        weights=np.array([[0.75, 0.25, 0], [0.5, 0.5, 0], [0.5, 0.5, 0], [1.0, 0, 0]]),
                        length=np.array([1.0, 1.0, 1.0, 0.0]), off=np.zeros(4))
    out, fig = lpairs.synthesize(captures, br, caps[[0, 0, 1, 2]], tolerance=0.05)
    assert len(calls) == 1 and sorted(calls[0]) == [0, 1, 2]  # one read of the captures used
    assert np.array_equal(out[3], caps[2]) and fig["detail"][3] == 1.0
    assert ssim(out[1], window(coffee, 103.0)) > 0.95
    assert set(fig) == {"detail", "flow_error", "decoded_gap"} and np.all(fig["decoded_gap"] >= 0)
    with pytest.raises(ValueError, match="pair flow"):
        lpairs.synthesize(captures, br, caps[[0, 0, 1, 2]], tolerance=0.05, method="none")


def test_a_pair_is_named_lower_index_first_whichever_way_it_is_passed():
    u, box = grid_bank()
    br = lpairs.Bracketer(u, box)
    a, b = br([[2.25, 3.0]]), br([[2.75, 3.0]])  # nearer to one end, then to the other
    assert (int(a.first[0]), int(a.second[0])) == (int(b.first[0]), int(b.second[0]))
    assert a.first[0] < a.second[0] and a.at[0] + b.at[0] == pytest.approx(1.0)


def test_likely_pairs_are_the_brackets_between_neighbouring_captures():
    u, box = grid_bank()  # 8 x 5, the first axis periodic
    br = lpairs.Bracketer(u, box)
    pairs = lpairs.likely_pairs(br)
    lengths = [np.linalg.norm((d := u[j] - u[i]) - box * np.round(d / box)) for i, j in pairs]
    assert all(i < j for i, j in pairs) and len(set(pairs)) == len(pairs) and max(lengths) <= lpairs.MAX_LENGTH
    # every grid edge is there: 8 x 5 along the periodic axis (it wraps) and 8 x 4 across it
    edges = {tuple(sorted((index(u, x, y), index(u, (x + 1) % 8, y)))) for x in range(8) for y in range(5)}
    edges |= {tuple(sorted((index(u, x, y), index(u, x, y + 1)))) for x in range(8) for y in range(4)}
    assert edges <= set(pairs) and len(edges) == 72
    # a missing capture: frames in its gap are made from pairs among them
    rest = np.delete(u, index(u, 3, 2), axis=0)
    gap = lpairs.Bracketer(rest, box)
    around = set(lpairs.likely_pairs(gap))
    b = gap([[x, 2.0] for x in (2.25, 2.5, 3.0, 3.5, 3.75)] + [[3.0, y] for y in (1.25, 1.5, 2.5, 2.75)])
    assert set(zip(b.first.tolist(), b.second.tolist())) <= around


def test_warming_fills_the_flow_cache_in_order_and_never_pushes_a_flow_out(coffee):
    caps = np.stack([window(coffee, 100.0 + 6 * i) for i in range(4)])
    pairs = [(0, 1), (1, 2), (2, 3)]
    one = lpairs.pair_flows(caps[0], caps[1]).nbytes
    cache = lpairs.FlowCache(budget=2 * one + one // 2)  # room for two pairs
    cache.put(("dis", 1, 2), lpairs.pair_flows(caps[1], caps[2]))  # kept from an earlier answer
    assert lpairs.warm(cache, lambda idx: caps[np.asarray(idx)], pairs, "dis") == 1
    assert cache.get(("dis", 0, 1)) is not None and cache.get(("dis", 1, 2)) is not None
    assert cache.get(("dis", 2, 3)) is None and len(cache) == 2
    stop = __import__("threading").Event()
    stop.set()
    assert lpairs.warm(lpairs.FlowCache(), lambda idx: caps[np.asarray(idx)], pairs, "dis", stop) == 0


# -- triangles of captures ---------------------------------------------------------------------
def test_a_point_inside_scattered_captures_gets_the_triangle_around_it():
    # three captures, none of their sides through the point: the triangle's barycentric weights give the
    # point back exactly (the definition of barycentric coordinates)
    u = np.array([[0.0, 0.0], [1.0, 0.1], [0.2, 1.0], [3.0, 3.0], [-2.0, 2.5]])
    box = np.array([100.0, 100.0])
    p = np.array([[0.4, 0.35]])
    b = lpairs.Bracketer(u + 10.0, box)(p + 10.0)
    assert b.triangle[0] and set(b.members[0].tolist()) == {0, 1, 2} and b.off[0] == pytest.approx(0.0, abs=1e-9)
    assert np.allclose(b.weights[0] @ u[b.members[0]], p[0]) and b.weights[0].sum() == pytest.approx(1.0)
    assert list(b.members[0]) == sorted(b.members[0])
    assert b.length[0] == pytest.approx(np.linalg.norm(u[1] - u[2]))  # the longest side
    # pairs only: the best pair misses the point
    assert lpairs.Bracketer(u + 10.0, box, triangles=False)(p + 10.0).off[0] > 0.1


def test_no_triangles_along_one_setting_or_from_collinear_captures():
    line = np.array([[0.0], [1.0], [2.0], [3.0]])
    b = lpairs.Bracketer(line, np.array([100.0]))([[1.5]])
    assert not b.triangle[0] and b.weights[0, 1] == pytest.approx(0.5)
    row = np.array([[0.0, 0.0], [1.0, 0.0], [2.0, 0.0], [3.0, 0.0]])
    b = lpairs.Bracketer(row, np.array([100.0, 100.0]))([[1.5, 0.0], [1.5, 0.2]])
    assert not b.triangle.any()


def shifted(photo, dx, dy):
    # a 64 px window of the photograph moved by (dx, dy) px with scipy.ndimage's cubic-spline shift
    big = photo[80:240, 120:280].astype(np.float64) / 255.0
    moved = np.stack([ndimage.shift(big[..., c], (-dy, -dx), order=3, mode="nearest") for c in range(3)], -1)
    return np.clip(moved[48:112, 48:112], 0, 1).astype(np.float32)


def test_a_frame_inside_a_triangle_of_shifted_photographs_is_the_true_view(coffee):
    # captures moved 6 px right and 6 px down from the first; the frame a third of the way to each
    caps = np.stack([shifted(coffee, 0, 0), shifted(coffee, 6, 0), shifted(coffee, 0, 6)])
    truth = shifted(coffee, 2, 2)
    decoded = blur(truth[None], 2.0)[0]  # what a small decoder gives: the right picture, blurred
    tri = lpairs.Bracket(members=np.array([[0, 1, 2]]), weights=np.array([[1 / 3, 1 / 3, 1 / 3]]),
                         length=np.array([1.4]), off=np.zeros(1))
    out, fig = lpairs.synthesize(lambda idx: caps[np.asarray(idx)], tri, decoded[None], tolerance=0.05)
    inner = (slice(4, -4), slice(4, -4))
    assert ssim(out[0][inner], truth[inner]) >= 0.95
    # the best a pair can do: the side from the second to the third capture passes (3, 3), 1.4 px off
    pair = lpairs.Bracket(members=np.array([[1, 2, 2]]), weights=np.array([[0.5, 0.5, 0.0]]),
                          length=np.array([1.4]), off=np.array([0.24]))
    by_pair, _ = lpairs.synthesize(lambda idx: caps[np.asarray(idx)], pair, decoded[None], tolerance=0.05)
    assert ssim(out[0][inner], truth[inner]) > ssim(by_pair[0][inner], truth[inner]) + 0.02
    assert 0.8 <= fig["detail"][0] <= 1.0 and fig["flow_error"][0] < 0.2

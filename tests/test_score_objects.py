"""Objects found as connected pieces of the foreground and matched one to one between frames.

Outside references: the area centroid of a disc is its centre (geometry; anti-aliased discs drawn by
supersampling, see test_score_tracks.render_disc); the optimal assignment is checked against an
exhaustive search over all pairings (the definition of the linear assignment problem) and scipy's
``linear_sum_assignment``.
"""

from itertools import permutations

import numpy as np
import pytest
from scipy.optimize import linear_sum_assignment

from kinecast.score import find_objects, match_objects, object_errors
from test_score_tracks import render_disc

SIZE = 64
BG_LEVEL = 0.2
RADIUS = 3.7  # the pendulum bob at 64 px
CENTROID_TOL = 0.1  # px, the tracker's accuracy on anti-aliased discs (as in test_score_tracks)


def discs(centres, radius=RADIUS):
    """One frame (1, 1, H, W) with a disc at each (x, y) centre on a flat background."""
    zero = np.zeros((SIZE, SIZE))
    cover = sum(render_disc([c], radius=radius, level=1.0, background=zero)[0, 0] for c in centres)
    return (BG_LEVEL + (0.9 - BG_LEVEL) * cover)[None, None].astype(np.float32)


BACKGROUND = np.full((1, SIZE, SIZE), BG_LEVEL, np.float32)
TRUE_CENTRES = np.array([[12.3, 40.6], [30.5, 15.25], [50.1, 47.8]])


def test_find_objects_recovers_each_disc_centre():
    # Geometry: each disc's area centroid is its centre; three separate discs give three objects.
    found = find_objects(discs(TRUE_CENTRES), BACKGROUND)
    assert len(found) == 1 and found[0].shape == (3, 2)
    order = [int(np.argmin(np.hypot(*(TRUE_CENTRES - p).T))) for p in found[0]]
    assert sorted(order) == [0, 1, 2]
    assert np.abs(found[0] - TRUE_CENTRES[order]).max() < CENTROID_TOL
    # an empty frame has no objects
    assert find_objects(np.broadcast_to(BACKGROUND, (1, 1, SIZE, SIZE)), BACKGROUND)[0].shape == (0, 2)


def test_hungarian_matching_recovers_a_known_permutation():
    # The predicted discs are the true ones moved by known offsets and listed in a permuted order;
    # the matching must undo the permutation, and each error is the offset's length (Pythagoras),
    # to within the centroid accuracy of both discs.
    offsets = np.array([[1.2, -0.9], [-2.0, 0.5], [0.3, 1.6]])
    perm = [2, 0, 1]  # predicted object j is true object perm[j]
    pred_xy = find_objects(discs(TRUE_CENTRES + offsets), BACKGROUND)[0]
    order = [int(np.argmin(np.hypot(*(TRUE_CENTRES + offsets - p).T))) for p in pred_xy]
    pred_xy = pred_xy[np.argsort(order)][perm]
    true_xy = find_objects(discs(TRUE_CENTRES), BACKGROUND)[0]
    true_xy = true_xy[np.argsort([int(np.argmin(np.hypot(*(TRUE_CENTRES - p).T))) for p in true_xy])]
    match, error = match_objects(pred_xy, true_xy)
    assert match.tolist() == [perm.index(i) for i in range(3)]
    assert error == pytest.approx(np.hypot(*offsets.T), abs=2 * CENTROID_TOL)


def test_matching_is_the_least_total_distance_not_greedy():
    # True objects at x = 10 and 20, predictions at x = 15 and 26. Greedy nearest-first from the
    # second true object takes 15 (5 px) and leaves 26 for the first (16 px, total 21); the optimal
    # assignment (exhaustive search over both pairings) is 10-15, 20-26 (total 11).
    true_xy = np.array([[10.0, 30.0], [20.0, 30.0]])
    pred_xy = np.array([[26.0, 30.0], [15.0, 30.0]])
    match, error = match_objects(pred_xy, true_xy)
    assert match.tolist() == [1, 0]
    assert error.tolist() == pytest.approx([5.0, 6.0])
    # random point sets: the total equals the exhaustive minimum and scipy's assignment
    rng = np.random.default_rng(3)
    for m, n in ((4, 4), (3, 5), (5, 3)):
        p, t = rng.random((m, 2)) * 60, rng.random((n, 2)) * 60
        dist = np.hypot(*(t[:, None] - p[None]).transpose(2, 0, 1))
        if n <= m:  # every true object gets a distinct prediction
            best = min(sum(dist[i, c] for i, c in enumerate(cols)) for cols in permutations(range(m), n))
        else:  # every prediction gets a distinct true object
            best = min(sum(dist[r, j] for j, r in enumerate(rows)) for rows in permutations(range(n), m))
        _, err = match_objects(p, t)
        r, c = linear_sum_assignment(dist)
        assert np.nansum(err) == pytest.approx(best) == pytest.approx(dist[r, c].sum())
        assert np.isnan(err).sum() == max(0, n - m)


def test_object_errors_count_missed_and_spurious_objects():
    # Frame 0: the prediction lacks the third disc (one miss). Frame 1: it adds a fourth (one
    # spurious object). Frame 2: exact. Frame 3: nothing drawn (three misses, no matched error).
    extra = np.array([[50.0, 12.0]])
    truth = np.concatenate([discs(TRUE_CENTRES)] * 4)
    pred = np.concatenate([discs(TRUE_CENTRES[:2]), discs(np.r_[TRUE_CENTRES, extra]),
                           discs(TRUE_CENTRES), np.broadcast_to(BACKGROUND, (1, 1, SIZE, SIZE))])
    out = object_errors(pred, truth, BACKGROUND)
    assert out["true_objects"].tolist() == [3, 3, 3, 3]
    assert out["missed_objects"].tolist() == [1, 0, 0, 3]
    assert out["spurious_objects"].tolist() == [0, 1, 0, 0]
    assert [int(np.isnan(e).sum()) for e in out["per_object"]] == [1, 0, 0, 3]
    # not exactly 0 in frame 0: the tracker's low-pass (tracks.TRACK_BLUR_PX) lets the missing
    # disc's faint tail weigh into its neighbour's centroid in the truth (0.005 px measured)
    assert out["matched_error_px"][:3] == pytest.approx([0.0, 0.0, 0.0], abs=0.02)
    assert np.isnan(out["matched_error_px"][3])

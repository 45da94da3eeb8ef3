"""Keep each keypoint slot on the same object from one frame to the next.

The keypoint encoder reads every frame on its own. Where two objects look alike (two pucks in grey)
nothing ties heat map k to one of them, and the encoder may read puck A as keypoint 0 in one frame
and as keypoint 1 in the next. An encoded track with such a swap jumps across the frame within one
frame interval, which no field of accelerations can follow: fitted to it, the dynamics stage learns
large accelerations where the objects glide freely, and a velocity from context frames that straddle
the swap is wrong in size and direction.

:func:`track_order` orders each frame's keypoints so that each slot continues where the constant-
velocity prediction from its previous two positions puts it: the assignment with the least summed
distance (the Hungarian algorithm, :func:`kinecast.frames.tracks.match_objects`), frame by frame,
as a multi-object tracker does. Keypoints that stay apart (a bob and its rod) are never reordered;
keypoints that sit on one spot may be, which changes nothing.

References
----------
H. W. Kuhn (1955). The Hungarian method for the assignment problem. Naval Research Logistics
Quarterly 2, 83-97.
Y. Bar-Shalom and T. E. Fortmann (1988). Tracking and Data Association. Academic Press (predicted
positions from a constant-velocity model, then a global nearest-neighbour assignment: common
practice in multi-object tracking).
"""

from __future__ import annotations

import numpy as np
import torch

from ..frames.tracks import match_objects

__all__ = ["track_order", "reorder", "follow"]


def _predict(history: list[tuple[int, np.ndarray]], t: int) -> np.ndarray:
    """Constant-velocity prediction at frame ``t`` from the last one or two ordered frames."""
    if len(history) == 1:
        return history[0][1]
    (t1, p1), (t2, p2) = history
    return p2 + (p2 - p1) * (t - t2) / (t2 - t1)


def track_order(points: torch.Tensor, valid: torch.Tensor | None = None) -> torch.Tensor:
    """Per-frame order of the keypoints that keeps each slot on one object.

    Parameters
    ----------
    points : Tensor [B, T, K, 2]
        Keypoint positions of B sequences of T frames (any units, the same for x and y).
    valid : Tensor [B, T] of bool, optional
        Frames to follow; the others keep the encoder's order and are skipped by the prediction
        (dropped frames).

    Returns
    -------
    LongTensor [B, T, K]
        ``order[b, t, j]`` is the encoder's keypoint that slot j holds in frame t; the first valid
        frame of each sequence keeps the encoder's order.

    Examples
    --------
    Two keypoints that trade places between the second and the third frame:

    >>> a = [[0.0, 0.0], [10.0, 0.0]]
    >>> pts = torch.tensor([[a, [[1.0, 0.0], [9.0, 0.0]], [[8.0, 0.0], [2.0, 0.0]]]])
    >>> track_order(pts)[0].tolist()
    [[0, 1], [0, 1], [1, 0]]
    """
    B, T, K, _ = points.shape
    order = np.tile(np.arange(K), (B, T, 1))
    if K > 1:
        p = points.detach().to("cpu", torch.float64).numpy()
        ok = np.ones((B, T), bool) if valid is None else valid.detach().cpu().numpy().astype(bool)
        for b in range(B):
            history: list[tuple[int, np.ndarray]] = []
            for t in np.flatnonzero(ok[b]):
                if history:
                    order[b, t] = match_objects(p[b, t], _predict(history, t))[0]
                history = (history + [(int(t), p[b, t][order[b, t]])])[-2:]
    return torch.from_numpy(order).to(points.device)


def reorder(x: torch.Tensor, order: torch.Tensor) -> torch.Tensor:
    """``x`` [B, T, 2K] (x, y per keypoint) with each frame's keypoints in ``order`` [B, T, K];
    differentiable in ``x``.

    Examples
    --------
    >>> reorder(torch.tensor([[[1.0, 2.0, 3.0, 4.0]]]), torch.tensor([[[1, 0]]])).tolist()
    [[[3.0, 4.0, 1.0, 2.0]]]
    """
    B, T, K = order.shape
    pairs = x.reshape(B, T, K, 2)
    return pairs.gather(2, order[..., None].expand(B, T, K, 2)).reshape(B, T, 2 * K)


def follow(x: torch.Tensor, *others: torch.Tensor, valid: torch.Tensor | None = None) -> list[torch.Tensor]:
    """Keypoint tracks ``x`` [B, T, 2K] and ``others`` (same shape: their variances, ...) put in
    the order of :func:`track_order` of ``x``.

    Examples
    --------
    >>> m = torch.tensor([[[0.0, 0, 10, 0], [1, 0, 9, 0], [8, 0, 2, 0]]])
    >>> follow(m)[0][0, 2].tolist()
    [2.0, 0.0, 8.0, 0.0]
    """
    B, T, q = x.shape
    order = track_order(x.reshape(B, T, q // 2, 2), valid)
    return [reorder(y, order) for y in (x, *others)]

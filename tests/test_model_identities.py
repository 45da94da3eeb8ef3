"""Keypoint identity tracking (model/identities.py) against closed-form motion.

- Two objects in uniform straight-line motion, x(t) = x0 + v·t (closed form), whose paths cross;
  the per-frame reads list them in a random order. Following them with a constant-velocity
  prediction and the least-distance assignment (Kuhn 1955; global nearest-neighbour association, common
  practice in multi-object tracking) must give back each object's own line in every frame.
- The velocity from three context frames (the second-order one-sided difference, a handbook formula)
  is the same whether or not the encoder listed the keypoints in another order in a later context frame.
- The central velocity (three-point derivative at the middle node, handbook; exact for quadratics)
  carried back one frame by the field's acceleration is exact for uniformly accelerated motion
  x(t) = x0 + v·t + a·t²/2 (closed form) when the field gives that constant acceleration a.
"""

import numpy as np
import torch

from kinecast.config import Config
from kinecast.model import build_model
from kinecast.model.identities import follow, track_order


def _crossing(T=40, seed=0):
    """Two objects on crossing lines (x, y in pixels), and the reads in a random order per frame."""
    t = np.arange(T, dtype=np.float64)[:, None]
    a = np.array([5.0, 20.0]) + np.array([1.0, 0.0]) * t       # left to right
    b = np.array([40.0, 5.0]) + np.array([-0.5, 0.9]) * t      # down and to the left; meets a near t = 26
    truth = np.stack([a, b], axis=1)  # [T, 2, 2]
    rng = np.random.default_rng(seed)
    swapped = rng.random(T) < 0.5
    swapped[0] = False
    reads = truth.copy()
    reads[swapped] = reads[swapped][:, ::-1]
    return truth, reads, swapped


def test_tracking_restores_objects_on_crossing_lines():
    truth, reads, swapped = _crossing()
    assert swapped.sum() > 5  # the reads really are mixed up
    order = track_order(torch.tensor(reads)[None])[0].numpy()
    fixed = np.take_along_axis(reads, order[..., None], axis=1)
    np.testing.assert_allclose(fixed, truth, atol=1e-9)


def test_tracking_keeps_each_object_through_small_read_noise():
    truth, reads, _ = _crossing(seed=1)
    noisy = reads + np.random.default_rng(2).normal(0.0, 0.3, reads.shape)  # 0.3 px read noise
    fixed = follow(torch.tensor(noisy).reshape(1, -1, 4))[0][0].reshape(-1, 2, 2).numpy()
    # away from the crossing (objects > 3 px apart) each slot holds its own object
    apart = np.linalg.norm(truth[:, 0] - truth[:, 1], axis=1) > 3.0
    err = np.linalg.norm(fixed - truth, axis=2)[apart]
    assert err.max() < 1.5, err.max()


def test_skipped_frames_keep_the_encoders_order_and_the_track_continues():
    truth, reads, swapped = _crossing(seed=3)
    valid = np.ones(len(reads), bool)
    valid[10:13] = False  # dropped frames: their reads are garbage
    reads[10:13] = 0.0
    order = track_order(torch.tensor(reads)[None], torch.tensor(valid)[None])[0].numpy()
    assert (order[~valid] == [0, 1]).all()
    fixed = np.take_along_axis(reads, order[..., None], axis=1)
    np.testing.assert_allclose(fixed[valid], truth[valid], atol=1e-9)


def _small_model(**model_opts):
    cfg = Config()
    cfg.data.size = 32
    cfg.model.enc_channels = cfg.model.dec_channels = 8
    for key, value in model_opts.items():
        setattr(cfg.model, key, value)
    torch.manual_seed(0)
    return cfg, build_model(cfg, 1).eval()


def test_context_velocity_does_not_depend_on_the_encoders_order():
    cfg, model = _small_model(context_velocity="one_sided")
    ctx = torch.rand(2, model.k, 1, 32, 32)
    reads = torch.tensor([[-0.5, 0.1, 0.6, -0.2]] * model.k) + torch.linspace(0, 0.04, model.k)[:, None]
    swap = reads[:, [2, 3, 0, 1]].clone()
    swap[0] = reads[0]  # the first frame in the same order, later ones swapped

    def with_reads(r):
        model.encode_positions = lambda x: (r.repeat(2, 1), torch.zeros(2 * model.k, model.q))
        return model.encode_dist(ctx)

    plain, mixed = with_reads(reads), with_reads(swap)
    # the handbook difference of positions moving 0.02 per frame interval: 0.02 / units_per_frame
    want = 0.02 / cfg.solver.units_per_frame
    torch.testing.assert_close(plain[2], torch.full_like(plain[2], want))
    torch.testing.assert_close(mixed[2], plain[2])
    torch.testing.assert_close(mixed[0], plain[0])


def test_central_context_velocity_is_exact_under_constant_acceleration():
    cfg, model = _small_model(context_velocity="central")
    a = torch.tensor([0.3, -0.2, 0.1, 0.4])
    with torch.no_grad():  # a field of constant acceleration a: last layer zero weights, bias a
        model.field.w_mu[-1].zero_()
        model.field.b_mu[-1].copy_(a)
    v = torch.tensor([0.05, -0.1, 0.0, 0.2])
    t = torch.tensor([0.0, 0.1, 0.25])  # uneven steps (a dropped half frame)
    m = torch.tensor([-0.4, 0.2, 0.5, -0.3]) + v * t[:, None] + 0.5 * a * t[:, None] ** 2
    got = model.context_velocity(m[None], t)
    torch.testing.assert_close(got[0], v, atol=1e-6, rtol=0)


def test_dynamics_stage_tracks_follow_each_object():
    # the dynamics stage's encoded tracks (train.stages.EncodedTrajectories) of reads listed in a
    # random order per frame are the objects' own straight lines again (closed form, as above)
    from kinecast.train.stages import EncodedTrajectories

    truth, reads, _ = _crossing(T=30, seed=4)
    _, model = _small_model()
    flat = torch.tensor(reads, dtype=torch.float32).reshape(len(reads), 4)
    model.encode_positions = lambda x: (flat[: len(x)], torch.zeros(len(x), 4))
    frames = torch.zeros(len(reads), 1, 32, 32)
    tracks = EncodedTrajectories(model, [frames], "cpu")
    got = tracks.means[0].reshape(-1, 2, 2).numpy()
    np.testing.assert_allclose(got, truth, atol=1e-4)

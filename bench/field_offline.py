"""The dynamics stage alone, field by field: ``python bench/field_offline.py RUN SCENE SECONDS SPECS [REFINE]``.

RUN is a run folder made by ``bench/recipe.py`` (its position encoder is kept frozen), SCENE the
rig folder it was trained on (12 trials: the first 8 train, the last 4 are held out). SPECS is a
comma-separated list of field variants ``ACT:HIDDEN:LAYERS:GROUP:BETA:ROBUST_PX:WINDOW[:TRACK[:ACC[:RAND]]]`` (e.g.
``relu:128:3:0:1:2:36``: ReLU 128×3, one MLP over the whole state, weight KL × 1, Huber beyond 2 px
(``train.dynamics_robust_px``), windows growing from 8 to 36 frames over the first half; TRACK 0 fits
the encoder's keypoint order as read, 1 (the default) the keypoints followed from frame to frame as
``model.keypoint_tracking`` does; ACC (optional, after TRACK) the weight of a penalty on the field's mean
absolute acceleration in px/frame² along the encoded training tracks, RAND the same at random states
(positions anywhere in the frame, the batch's velocities shuffled); held-out errors are always against the followed tracks). For each,
a fresh field (seed 0) is trained for SECONDS on the encoded keypoint tracks of the training trials,
then rolled out freely from each trial's encoded start with the model's v0 from its first frames
(``LatentODE.context_velocity``; rows before 2026-12-03 12:00 used the one-sided difference); the printed
error (model pixels) is over the keypoints the encoder uses, averaged over forecast frames 1-20 and
1-60, on the held-out trials and (1-60) on the training trials. Used for the "field on impacts"
notes in DEVELOPERS.md (rows before 2026-12-03 grew the windows to 60 over 70 % of the time).
REFINE (optional) reads the tracks and v0 with ``model.read_refinement`` = REFINE steps (rows of the
thirteenth session's offline field study quote 0 and 30).
Numbers are statistical extrapolations on synthetic rigs, not measurements.
"""
import csv
import sys
import time
from pathlib import Path

import numpy as np
import torch

if __package__ in (None, ""):
    sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "src"))
from kinecast.train import load_run
from kinecast.frames import read_recording
from kinecast.train.loop import to_model_time
from kinecast.model.field import DynamicsField
from kinecast.model.staged import encode_all, dynamics_terms
from kinecast.model.identities import follow
torch.set_num_threads(2)
FREE_ACC = 0.05  # px/frame²: below this a true track counts as free flight (air table: ~0.002 there)
run, scene = sys.argv[1], sys.argv[2]
secs = float(sys.argv[3]) if len(sys.argv) > 3 else 60
model, cfg = load_run(run)
if len(sys.argv) > 5:  # optional REFINE: model.read_refinement steps for the encoded tracks and v0 reads
    model.refine_steps = cfg.model.read_refinement = int(sys.argv[5])
trials = sorted(p for p in Path(scene).iterdir() if p.is_dir())
data_all = []
for tr in trials:
    rec = read_recording(tr, cfg.data)
    fr = torch.as_tensor(np.asarray(rec.frames), dtype=torch.float32)
    t = to_model_time(torch.as_tensor(np.asarray(rec.times), dtype=torch.float32)[None], cfg)[0]
    m, v = encode_all(model, fr)
    data_all.append((fr, t - t[0], m, v, *(x[0] for x in follow(m[None], v[None]))))
n, q, k = cfg.data.size, model.q, model.k
good = (data_all[0][3].mean(0).sqrt() * n / 2 < 2.0)  # coordinates the encoder uses
print("used coords", good.tolist(), flush=True)
VARIANTS = {}
for spec in sys.argv[4].split(","):
    act, h, l, g, beta, rob, wmax, *rest = spec.split(":")
    VARIANTS[spec] = dict(act=act, h=int(h), l=int(l), g=int(g), beta=float(beta), rob=float(rob), W=int(wmax),
                          track=bool(int(rest[0])) if rest else True, acc=float(rest[1]) if len(rest) > 1 else 0.0,
                          rand=float(rest[2]) if len(rest) > 2 else 0.0)
model.velocity_correction = False
# keypoints that barely move in the training tracks are held still, as fit does (train.still_keypoint_px)
from types import SimpleNamespace  # noqa: E402
from kinecast.train.stages import hold_still  # noqa: E402


def accel_px(state: torch.Tensor, dt: float) -> torch.Tensor:
    """The field's (posterior-mean) acceleration at latent states [N, 2q] in model px/frame²."""
    return model.field(0, state)[:, q:] * dt * dt * n / 2


def free_flight(held_trials, held_data) -> str:
    """The field's mean |acceleration| (px/frame²) along the held-out trials' true tracks (a rig's
    truth.csv, one point per object in model pixels) where the true acceleration is ~0 (free flight),
    and its mean error where it is not (impacts, turning points); '' without truth files."""
    if model.field.group != 2:
        return ""
    free, other = [], []
    for tr, (_, t, *_rest) in zip(held_trials, held_data):
        if not (tr / "truth.csv").is_file():
            return ""
        with open(tr / "truth.csv") as f:
            rows = list(csv.DictReader(f))
        objs = len([c for c in rows[0] if c.startswith("x_") and c.endswith("_px")])
        if 2 * objs != q:
            return ""
        xy = np.array([[[float(r[f"x_{j}_px"]), float(r[f"y_{j}_px"])] for j in range(objs)] for r in rows])
        vel = np.gradient(xy, axis=0); acc = np.gradient(vel, axis=0)  # px/frame, px/frame²
        dt = float(t[1] - t[0])
        state = torch.tensor(np.concatenate([((xy + 0.5) * 2 / n - 1).reshape(len(xy), -1),
                                             (vel * 2 / n / dt).reshape(len(xy), -1)], 1), dtype=torch.float32)
        with torch.no_grad():  # truth's object order need not be the keypoints': each object's own law
            a = accel_px(state, dt).numpy().reshape(len(xy), objs, 2)
        true_a = np.linalg.norm(acc, axis=-1)
        still = true_a < FREE_ACC
        free.append(np.linalg.norm(a, axis=-1)[still]); other.append(np.linalg.norm(a - acc, axis=-1)[~still])
    return (f"; along true held-out tracks |a| in free flight {np.concatenate(free).mean():.3f} px/frame², "
            f"error elsewhere {np.concatenate(other).mean():.3f}")


pick = list(VARIANTS)
gen = np.random.default_rng(0)
for name in pick:
    V = VARIANTS[name]
    model.tracking = V["track"]  # the tracks as fit's dynamics stage sees them (identities.py)
    data = [(fr, t, *((mt, vt) if V["track"] else (m, v)), mt, vt) for fr, t, m, v, mt, vt in data_all]
    torch.manual_seed(0)
    model.field = DynamicsField(q, V["h"], V["l"], True, True, cfg.model.prior_std, cfg.model.init_logstd,
                                activation=V["act"], group=V["g"])
    still = hold_still(model, SimpleNamespace(means=[d[2] for d in data[:8]]),
                       cfg.train.still_keypoint_px)
    with torch.no_grad():
        model.vel_enc.head.weight[:q].zero_(); model.vel_enc.head.bias[:q].zero_()
    params = list(model.field.parameters()) + list(model.vel_enc.parameters())
    opt = torch.optim.Adam(params, lr=3e-3)
    t0 = time.time(); steps = 0
    while time.time() - t0 < secs:
        frac = (time.time() - t0) / secs
        W = int(8 + (V["W"] - 8) * min(1.0, frac / 0.5))
        idx = gen.integers(0, 8, 8); st = [int(gen.integers(0, len(data[i][2]) - W + 1)) for i in idx]
        ctx = torch.stack([data[i][0][s:s + k] for i, s in zip(idx, st)])
        tm = torch.stack([data[i][2][s:s + W] for i, s in zip(idx, st)])
        tv = torch.stack([data[i][3][s:s + W] for i, s in zip(idx, st)])
        tt = data[idx[0]][1][st[0]:st[0] + W]
        terms = dynamics_terms(model, ctx, tt - tt[0], tm, tv, torch.ones(8, W, dtype=torch.bool), 720, V["beta"], 1.0, robust_px=V["rob"])
        loss = terms["loss"]
        if V["acc"] or V["rand"]:
            dt = float(tt[1] - tt[0]); vel = torch.gradient(tm, spacing=dt, dim=1)[0].flatten(0, 1)
            on_tracks = torch.cat([tm.flatten(0, 1), vel], dim=1)
            anywhere = torch.cat([torch.rand_like(vel) * 2 - 1, vel[torch.randperm(len(vel))]], dim=1)
            loss = (loss + V["acc"] * accel_px(on_tracks, dt).abs().mean()
                    + V["rand"] * accel_px(anywhere, dt).abs().mean())
        opt.zero_grad(); loss.backward(); torch.nn.utils.clip_grad_norm_(params, 1.0); opt.step(); steps += 1
    held, fitted = [], []
    with torch.no_grad():
        for j, (fr, t, m, v, mt, _) in enumerate(data):  # scored against the tracked reads
            s0 = m[0:1]; v0 = model.context_velocity(m[None, :k], t[:k])  # as fit's forecasts
            traj = model.integrate(torch.cat([s0, v0], 1), t[:61])[:, 0, :q]
            e = ((traj - mt[:61]) * n / 2).view(61, -1, 2)
            e = e[:, good.view(-1, 2).all(1)].norm(dim=-1).mean(1)
            (held if j >= 8 else fitted).append((float(e[1:21].mean()), float(e[1:61].mean())))
    h20, h60 = np.mean(held, axis=0)
    print(f"{name:26s} still {still} steps {steps:5d} held-out kp err @20 {h20:6.2f} @60 {h60:6.2f} px, "
          f"training trials @60 {np.mean(fitted, axis=0)[1]:6.2f}  kl_w {float(terms['kl_w']):.2f} nll {float(terms['nll']):.2f}"
          + free_flight(trials[8:], data[8:]), flush=True)

"""Which part of a trained keypoint model fails on a scene: the encoder, the decoder or the dynamics?

``python bench/where_it_fails.py RUN TRIAL [TRIAL ...]`` reads each held-out trial and prints, per
trial, in model pixels:

- *encoder*: mean distance from each true object (the separate foreground pieces of
  :func:`kinecast.frames.tracks.find_objects`) to the nearest keypoint read from the true frame;
- *decoder*: per-object error (:func:`kinecast.frames.tracks.object_errors`, objects matched frame by
  frame) of the frames decoded from those keypoints: the autoencoder alone, no dynamics;
- *dynamics*: mean distance of each moving keypoint of the free rollout (mean weights, from the
  first ``model.velocity_frames`` frames) from the keypoint read from the true frame (read keypoints
  followed from frame to frame, ``model.keypoint_tracking``), over forecast frames 1-20 and 1-60;
- how often following the keypoints changed the encoder's order between consecutive frames (the
  encoder swapping alike objects; 0 on a single-object scene);
- the heat maps' shape: mean probability of a map's most probable cell (1/(2π) ≈ 0.16 for a
  Gaussian bump of one cell's std, closed form; near 1 when a map has sharpened into one cell and snaps its keypoint to the cell grid)
  and the share of a map's mass farther than ``FAR_CELLS`` cells from that cell (mass on another
  object, which pulls a whole-map read; ``model.keypoint_window`` reads around the peak instead).

A forecast that fails with small encoder and decoder errors fails in the dynamics. Keypoints are
converted from normalised image coordinates as ``(x + 1) · size / 2 − 0.5`` (pixel centres).
Scores are statistical extrapolations on recordings, not measurements; not for safety-critical control.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import numpy as np
import torch

if __package__ in (None, ""):  # run as a script: make `kinecast` importable from the checkout
    sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "src"))

from kinecast.frames import read_recording  # noqa: E402
from kinecast.frames.tracks import find_objects, object_errors  # noqa: E402
from kinecast.model import to_model_time  # noqa: E402
from kinecast.model.identities import reorder, track_order  # noqa: E402
from kinecast.model.keypoints import to_model_pixels  # noqa: E402
from kinecast.model.staged import encode_all  # noqa: E402
from kinecast.runfolder import load_run  # noqa: E402

HORIZONS = (20, 60)  # forecast frames over which the dynamics error is averaged
FAR_CELLS = 3  # heat-map mass farther than this from a map's peak (in cells) counts as "far"


def map_shape(model, frames: torch.Tensor) -> tuple[float, float]:
    """Mean peak-cell probability and mean far mass (beyond ``FAR_CELLS`` of the peak) of the
    keypoint encoder's heat maps on ``frames``."""
    with torch.no_grad():
        p = model.pos_enc(frames, model.background, with_maps=True)[2].exp()
    B, K, h, w = p.shape
    peak = p.flatten(2).argmax(-1)
    dy = torch.arange(h)[None, None, :, None] - (peak // w)[..., None, None]
    dx = torch.arange(w)[None, None, None, :] - (peak % w)[..., None, None]
    far = (dx ** 2 + dy ** 2) > FAR_CELLS ** 2
    return float(p.flatten(2).max(-1).values.mean()), float((p * far).sum(dim=(2, 3)).mean())


def diagnose(model, cfg, rec) -> dict:
    """Encoder, decoder and dynamics errors (model px) of ``model`` on the recording ``rec``."""
    k, size = cfg.model.velocity_frames, cfg.data.size
    background = model.background.detach().cpu().numpy() if cfg.model.background else None
    frames = torch.as_tensor(rec.frames)
    times = to_model_time(rec.times - rec.times[0], cfg)
    with torch.no_grad():
        read, _ = encode_all(model, frames)
        order = track_order(read.view(1, len(frames), -1, 2))[0]  # the encoder's order → followed slots
        swaps = int((order[1:] != order[:-1]).any(dim=1).sum())
        if model.tracking:  # one slot per object, as the dynamics stage sees the tracks
            read = reorder(read[None], order[None])[0]
        free = model.sample_latents(frames[None, :k], times, 1, mean_weights=True, sample_init=False,
                                    ctx_t=times[:k])[0, 0, :, :model.q]
        decoded = model.decode(read[None])[0].numpy()
    to_px = lambda xy: to_model_pixels(xy.view(len(frames), -1, 2).numpy(), size)  # noqa: E731
    read_px, free_px = to_px(read), to_px(free)
    objects = find_objects(rec.frames, background)
    nearest = [np.linalg.norm(o[:, None] - kp[None], axis=-1).min(axis=1).mean()
               for o, kp in zip(objects, read_px) if len(o)]
    moving = model.field.moving.view(-1, 2)[:, 0].bool().numpy()
    drift = np.linalg.norm(free_px - read_px, axis=-1)[:, moving]
    out = {"objects_per_frame": float(np.mean([len(o) for o in objects])), "order_changes": swaps,
           "frame_steps": len(frames) - 1,
           "encoder_px": float(np.mean(nearest)) if nearest else float("nan"),
           "decoder_px": float(np.nanmean(object_errors(decoded, rec.frames, background)["matched_error_px"]))}
    out["map_peak"], out["map_far"] = map_shape(model, frames)
    for h in HORIZONS:
        out[f"dynamics_{h}_px"] = float(drift[k:k + h].mean()) if drift.size else float("nan")
    return out


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("run", help="a run folder written by kinecast fit (keypoint encoder)")
    parser.add_argument("trials", nargs="+", help="held-out recordings of the same scene")
    args = parser.parse_args(argv)
    model, cfg = load_run(args.run)
    if not model.keypoints:
        print(f"{args.run}: not a keypoint model; nothing to split", file=sys.stderr)
        return 2
    print(f"{args.run}: {model.q // 2} keypoints, moving {model.field.moving.view(-1, 2)[:, 0].bool().tolist()}")
    for trial in args.trials:
        got = diagnose(model, cfg, read_recording(trial, cfg.data))
        print(f"  {Path(trial).name}: {got['objects_per_frame']:.2f} objects/frame; keypoint order changed "
              f"{got['order_changes']} times in {got['frame_steps']} frame steps; encoder {got['encoder_px']:.2f} px, "
              f"decoder {got['decoder_px']:.2f} px, dynamics "
              + ", ".join(f"{got[f'dynamics_{h}_px']:.2f} px over {h} frames" for h in HORIZONS)
              + f"; heat maps: peak cell {got['map_peak']:.2f}, far mass {got['map_far']:.3f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())

"""The Python API in a plain script: render a rig, read it, train, forecast, fill, score.

Run from the repository root: ``.venv/bin/python demos/python_api.py`` (about 2 minutes).
Everything goes to demo_output/api/. The pendulum rig is our own synthetic scenario.
Forecasts are statistical extrapolations, not measurements; not for safety-critical control.
"""

import shutil
from pathlib import Path

import numpy as np

from kinecast import config
from kinecast.forecast import core
from kinecast.frames import read_recording
from kinecast.rigs import Camera, write_rig
from kinecast.score import persistence, ssim
from kinecast.score.verdict import judge_run
from kinecast.train import fit, load_run

out = Path("demo_output/api")
shutil.rmtree(out, ignore_errors=True)

# 1. Data: six training trials and one held-out trial (another seed), with a little sensor noise.
write_rig("pendulum", out / "train", trials=6, frames=90, seed=1, camera=Camera(noise=0.01))
write_rig("pendulum", out / "heldout", trials=1, frames=90, seed=2, camera=Camera(noise=0.01))

# 2. One config object for everything; change keys in code or with config.apply_overrides.
cfg = config.apply_overrides(config.Config(), ["train.budget=90s", "train.window_max=30"])

# 3. Train (writes a run folder; judge_run adds the verdict on the held-out trials) and load the
#    best weights back.
summary = fit([out / "train"], out / "run", cfg, judge=judge_run)
model, cfg = load_run(out / "run")
print("trained", summary["steps"], "steps; best validation MSE", summary["best_val_mse"])
print("verdict:", summary["verdict"]["text"])

# 4. Forecast 60 frames from the held-out trial's first three frames and compare with the truth.
rec = read_recording(out / "heldout" / "trial_000", cfg.data)
fc = core.forecast(model, cfg, rec, n_frames=60, start=3, samples=4)
truth = rec.frames[3:63]
model_ssim = ssim(fc.mean, truth).mean()
still_ssim = ssim(persistence(rec.frames[:3], 60), truth).mean()
print(f"mean SSIM over 60 frames: model {model_ssim:.3f}, persistence {still_ssim:.3f}")
print("per-pixel spread of the 4 sampled futures, mean:", float(fc.spread.mean()))

# 5. Frames at any times, e.g. 4x slow motion of the first second.
slow = core.resample(model, cfg, rec, np.arange(0, 1.0, rec.median_interval / 4))
print("slow motion frames:", slow.mean.shape)

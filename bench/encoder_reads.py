"""How far a run's position encoder reads the object: ``python bench/encoder_reads.py RUN SCENE``.

RUN is a run folder or a kept-checkpoint copy (e.g. ``<run>_snaps/snap_0000`` of ``bench/quality.py``:
the first is the encoder the dynamics stage froze); SCENE a rig folder of trials with ``truth.csv``
(a pendulum rig: column ``bob_x_px`` / ``bob_y_px``, model pixels). For each of the first 12 trials the
keypoint nearest the true bob is mapped to it by least squares (an affine map, so a constant offset
or scale of the keypoint does not count); printed: the mean distance after the map, and the
frame-to-frame jitter of the keypoint about a 7-frame quadratic (scipy.signal.savgol_filter,
Savitzky & Golay 1964). Used for the twenty-ninth session's note on stalled dynamics stages.
Numbers are statistical reads on synthetic rigs, not measurements.
"""
import csv
import sys
from pathlib import Path

import numpy as np
import torch
from scipy.signal import savgol_filter

if __package__ in (None, ""):
    sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "src"))
from kinecast.frames import read_recording  # noqa: E402
from kinecast.model.staged import encode_all  # noqa: E402
from kinecast.train import load_run  # noqa: E402

TRIALS = 12
SMOOTH_FRAMES = 7  # the quadratic's window (frames)


def main(run: str, scene: str) -> None:
    torch.set_num_threads(2)
    model, cfg = load_run(run)
    n = cfg.data.size
    off, jitter = [], []
    for tr in sorted(p for p in Path(scene).iterdir() if p.is_dir())[:TRIALS]:
        rec = read_recording(tr, cfg.data)
        with torch.no_grad():
            m, _ = encode_all(model, torch.as_tensor(np.asarray(rec.frames), dtype=torch.float32))
        kp = (m.numpy().reshape(len(m), -1, 2) + 1) * n / 2 - 0.5  # model pixels
        with open(tr / "truth.csv") as f:
            xy = np.array([[float(r["bob_x_px"]), float(r["bob_y_px"])] for r in csv.DictReader(f)])[:len(kp)]
        j = int(np.argmin([np.linalg.norm(kp[:, i] - xy, axis=1).mean() for i in range(kp.shape[1])]))
        a = np.c_[kp[:, j], np.ones(len(kp))]
        coef, *_ = np.linalg.lstsq(a, xy, rcond=None)
        off.append(np.linalg.norm(a @ coef - xy, axis=1).mean())
        jitter.append(np.linalg.norm(kp[:, j] - savgol_filter(kp[:, j], SMOOTH_FRAMES, 2, axis=0), axis=1).mean())
    print(f"{run}: bob read {np.mean(off):.2f} px off after an affine map (trials {min(off):.2f}-{max(off):.2f}), "
          f"jitter about a {SMOOTH_FRAMES}-frame quadratic {np.mean(jitter):.3f} px")


if __name__ == "__main__":
    main(sys.argv[1], sys.argv[2])

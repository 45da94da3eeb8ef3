"""The run folder: its files, checks, tensor files, loading a trained model, summary and log.

A run folder (written by ``kinecast fit``) holds::

    config.toml          the full config actually used (time scale resolved from the data)
    weights.safetensors  the best model weights (by validation), background image and spread scale
    resume.safetensors   the latest model + optimiser tensors + random state, for --resume
    log.csv              every logged term per step
    background.png       the static background the decoder adds to
    loss.png             the training curves
    summary.json         what happened, for people and for reports
    fit.lock             only while a fit writes the folder: who is writing it (train/lock.py)

Nothing is ever unpickled: tensors are safetensors, everything else TOML, JSON or CSV. Each file is
written under a temporary name and renamed, so a kill leaves the previous version. What a resume
checkpoint must hold is the trainer's business (:mod:`kinecast.train.checkpoint`).
"""

from __future__ import annotations

import hashlib
import json
import os
import time
from pathlib import Path

import torch
from safetensors import SafetensorError, safe_open
from safetensors.torch import save_file

from . import config as cfgmod
from .errors import KinecastError
from .fileio import read_numeric_csv, write_text, write_with

CONFIG = "config.toml"
WEIGHTS = "weights.safetensors"
RESUME = "resume.safetensors"
LOG = "log.csv"
SUMMARY = "summary.json"
BACKGROUND = "background.png"
LOSS_PLOT = "loss.png"
_META_KEY = "kinecast"
_SUM_KEY = "kinecast_sha256"
LOCK = "fit.lock"  # see train/lock.py
RUN_FILES = (CONFIG, WEIGHTS, RESUME, LOG, SUMMARY, BACKGROUND, LOSS_PLOT, LOCK)
PAUSE_ENV = "KINECAST_TEST_CHECKPOINT_PAUSE"  # test hook, see _test_pause
# Version of the networks' layout, written with every checkpoint. Bump it when a change makes old
# weights compute something else although their tensor names and shapes still match.
# 1: ELU activations (files without the key); 2: SiLU activations (model/convnets.py);
# 3: the velocity encoder reads the position readings of the context frames; keypoint encoder;
# 4: v0 is the finite difference alone by default (model.velocity_correction, absent = false).
MODEL_LAYOUT = 4


def save_tensors(path: Path, tensors: dict[str, torch.Tensor], meta: dict) -> None:
    """Atomically write tensors (made contiguous, on the CPU) plus a JSON metadata blob."""
    flat = {k: v.detach().to("cpu").contiguous() for k, v in tensors.items()}
    meta = {"layout": MODEL_LAYOUT, **meta}

    def write(tmp: Path) -> None:
        save_file(flat, str(tmp), metadata={_META_KEY: json.dumps(meta), _SUM_KEY: tensors_digest(flat)})
        _test_pause()

    write_with(path, write)


def _test_pause() -> None:
    """Test hook: hold a written temporary checkpoint ``$KINECAST_TEST_CHECKPOINT_PAUSE`` seconds
    before it is renamed into place, so a test can kill the process mid-checkpoint. Unset: no pause."""
    try:
        seconds = float(os.environ.get(PAUSE_ENV) or 0.0)
    except ValueError:
        seconds = 0.0
    if seconds > 0:
        time.sleep(seconds)


def remove_stale_temporaries(run: Path) -> list[Path]:
    """Delete temporaries of this folder's own files left by a killed run (``.resume.*.tmp.safetensors``
    ...); nothing else is touched. Returns what was removed."""
    gone = []
    for name in RUN_FILES:
        stem, suffix = Path(name).stem, Path(name).suffix
        for tmp in run.glob(f".{stem}.*.tmp{suffix}"):
            tmp.unlink(missing_ok=True)
            gone.append(tmp)
    return gone


def load_tensors(path: Path) -> tuple[dict[str, torch.Tensor], dict]:
    """Read a safetensors file written by :func:`save_tensors`; refuse damaged files clearly."""
    if not path.is_file():
        raise KinecastError(path, "missing")
    try:
        with safe_open(str(path), framework="pt") as fh:  # one pass: header and tensors
            header = fh.metadata() or {}
            tensors = {key: fh.get_tensor(key) for key in fh.keys()}
        meta = json.loads(header.get(_META_KEY, "{}"))
    except (SafetensorError, OSError, ValueError, RuntimeError) as exc:
        reason = " ".join(str(exc).split())
        raise KinecastError(path, f"damaged or not a kinecast safetensors file ({reason})") from None
    # safetensors itself has no checksum: a flipped bit in the tensor data would load silently
    if _SUM_KEY in header and header[_SUM_KEY] != tensors_digest(tensors):
        raise KinecastError(path, "damaged: the tensor data does not match the checksum written with "
                                  "it (the file changed after it was saved)")
    return tensors, meta


def tensors_digest(tensors: dict[str, torch.Tensor]) -> str:
    """SHA-256 over every tensor's name, dtype, shape and raw bytes, in name order."""
    digest = hashlib.sha256()
    for name in sorted(tensors):
        t = tensors[name].detach().to("cpu").contiguous().reshape(-1)
        digest.update(f"{name}|{t.dtype}|{tuple(tensors[name].shape)}|".encode())
        digest.update(t.view(torch.uint8).numpy().tobytes())
    return digest.hexdigest()


def check_run_folder(run: Path, need_resume: bool = False) -> None:
    """Raise a clear error unless ``run`` looks like a kinecast run folder."""
    if not run.is_dir():
        raise KinecastError(run, f"not a run folder ({'a file' if run.exists() else 'no such folder'})")
    # resuming needs the latest state, not the best weights (written at the first validation,
    # which may come after the first checkpoint)
    need = [CONFIG, RESUME] if need_resume else [CONFIG, WEIGHTS]
    missing = [n for n in need if not (run / n).is_file()]
    if missing:
        raise KinecastError(run, f"not a complete run folder (missing {', '.join(missing)})")


def load_run(run: str | Path, device: str | torch.device = "cpu", precision: str | None = None):
    """Load a trained run: ``(model, cfg)`` with the best weights, in eval mode.

    Parameters
    ----------
    run : path
        A run folder written by ``kinecast fit``.
    device : str or torch.device
        Where to put the model.
    precision : str, optional
        ``train.precision`` to run the conv nets in (see :mod:`kinecast.model.precision`); default:
        the run's own. The weights are the same in either.

    Examples
    --------
    >>> model, cfg = load_run("runs/pendulum")  # doctest: +SKIP
    """
    from .model import build_model
    from .model.precision import use_precision

    run = Path(run)
    check_run_folder(run)
    cfg = cfgmod.load(run / CONFIG, cfgmod.saved_run_base())
    tensors, meta = load_tensors(run / WEIGHTS)
    model = build_model(cfg, cfg.data.channels)
    restore_model(model, tensors, meta, run / WEIGHTS)
    model.to(device).eval()
    use_precision(model, cfg.train.precision if precision is None else precision, device)
    return model, cfg


def restore_model(model: torch.nn.Module, tensors: dict[str, torch.Tensor], meta: dict, path: Path) -> None:
    """Load ``tensors`` into ``model``; a mismatch with the config or with this version's network
    layout (``meta["layout"]``, see :data:`MODEL_LAYOUT`) is one clear line naming ``path``."""
    if "background" in tensors:
        model.set_background(tensors["background"])
    for name, fill in (("field.moving", 1.0), ("spread_scale", 1.0), ("pixel_noise", 0.0)):
        # written before still keypoints were held / before the spread was calibrated (same layout
        # otherwise): every coordinate moves, the spread is the posterior's own, no pixel noise
        if name not in tensors and name in model.state_dict():
            tensors = {**tensors, name: torch.full_like(model.state_dict()[name], fill)}
    problem = weights_mismatch(tensors, model.state_dict())
    try:
        if problem is None:
            model.load_state_dict(tensors, strict=True)
    except RuntimeError as exc:
        problem = " ".join(str(exc).split())
    if problem is not None:
        raise KinecastError(path, f"weights do not match the run's config.toml ({problem})")
    layout = meta.get("layout", 1)
    if layout != MODEL_LAYOUT:
        raise KinecastError(path, f"weights were written for network layout {layout}; this kinecast "
                                  f"builds layout {MODEL_LAYOUT}: train the run again")


def weights_mismatch(saved: dict[str, torch.Tensor], expected: dict[str, torch.Tensor]) -> str | None:
    """The first difference between saved tensors and the ones a model expects, or None."""
    for name, want in expected.items():
        if name not in saved:
            return f"tensor {name} is not in the file"
        if tuple(saved[name].shape) != tuple(want.shape):
            return (f"tensor {name} has shape {tuple(saved[name].shape)} in the file but the config "
                    f"builds {tuple(want.shape)}")
    extra = sorted(set(saved) - set(expected))
    return f"the file has tensor {extra[0]} that the config does not build" if extra else None


def write_summary(run: Path, summary: dict) -> None:
    write_text(run / SUMMARY, json.dumps(summary, indent=2, sort_keys=True) + "\n")


def write_log(run: Path, rows: list[dict]) -> None:
    if not rows:
        return
    cols = list(dict.fromkeys(k for r in rows for k in r))
    lines = [",".join(cols)] + [",".join(_fmt(r.get(c, "")) for c in cols) for r in rows]
    write_text(run / LOG, "\n".join(lines) + "\n")


def read_log(run: Path) -> list[dict]:
    """The rows of ``run``'s log.csv (empty cells left out of each row); [] when there is none."""
    path = run / LOG
    if not path.is_file():
        return []
    header, rows = read_numeric_csv(path, "training log")
    return [{c: v for c, v in zip(header, row) if v is not None} for row in rows]


def _fmt(v) -> str:
    return f"{v:.6g}" if isinstance(v, float) else str(v)

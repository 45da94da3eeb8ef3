"""Run folders and checkpoints: safetensors for tensors, TOML/JSON for everything else.

Nothing is ever unpickled. A run folder holds::

    config.toml          the full config actually used (time scale resolved from the data)
    weights.safetensors  the best model weights (by validation), background image included
    resume.safetensors   the latest model + optimiser tensors + random state, for --resume
    log.csv              every logged term per step
    background.png       the static background the decoder adds to
    loss.png             the training curves
    summary.json         what happened, for people and for reports

Each file is written under a temporary name and renamed, so a kill leaves the previous version.
"""

from __future__ import annotations

import json
from pathlib import Path

import torch
from safetensors import SafetensorError
from safetensors.torch import load_file, save_file

from .. import config as cfgmod
from ..errors import KinecastError
from ..fileio import write_text, write_with

CONFIG = "config.toml"
WEIGHTS = "weights.safetensors"
RESUME = "resume.safetensors"
LOG = "log.csv"
SUMMARY = "summary.json"
BACKGROUND = "background.png"
LOSS_PLOT = "loss.png"
_META_KEY = "kinecast"


def save_tensors(path: Path, tensors: dict[str, torch.Tensor], meta: dict) -> None:
    """Atomically write tensors (made contiguous, on the CPU) plus a JSON metadata blob."""
    flat = {k: v.detach().to("cpu").contiguous() for k, v in tensors.items()}
    write_with(path, lambda tmp: save_file(flat, str(tmp), metadata={_META_KEY: json.dumps(meta)}))


def load_tensors(path: Path) -> tuple[dict[str, torch.Tensor], dict]:
    """Read a safetensors file written by :func:`save_tensors`; refuse damaged files clearly."""
    if not path.is_file():
        raise KinecastError(path, "missing")
    try:
        tensors = load_file(str(path))
        from safetensors import safe_open

        with safe_open(str(path), framework="pt") as fh:
            meta = json.loads((fh.metadata() or {}).get(_META_KEY, "{}"))
    except (SafetensorError, OSError, ValueError, RuntimeError) as exc:
        raise KinecastError(path, f"damaged or not a kinecast safetensors file ({exc})") from None
    return tensors, meta


def check_run_folder(run: Path, need_resume: bool = False) -> None:
    """Raise a clear error unless ``run`` looks like a kinecast run folder."""
    if not run.is_dir():
        raise KinecastError(run, "not a run folder (no such folder)")
    need = [CONFIG, WEIGHTS] + ([RESUME] if need_resume else [])
    missing = [n for n in need if not (run / n).is_file()]
    if missing:
        raise KinecastError(run, f"not a complete run folder (missing {', '.join(missing)})")


def optimizer_tensors(opt: torch.optim.Optimizer) -> tuple[dict[str, torch.Tensor], dict]:
    """Split an optimiser state dict into tensors and JSON-able scalars."""
    sd = opt.state_dict()
    tensors, scalars = {}, {}
    for idx, state in sd["state"].items():
        for name, value in state.items():
            if torch.is_tensor(value):
                tensors[f"opt.{idx}.{name}"] = value
            else:
                scalars[f"{idx}.{name}"] = value
    return tensors, {"param_groups": sd["param_groups"], "scalars": scalars}


def restore_optimizer(opt: torch.optim.Optimizer, tensors: dict[str, torch.Tensor], meta: dict) -> None:
    state: dict[int, dict] = {}
    for key, value in tensors.items():
        if key.startswith("opt."):
            _, idx, name = key.split(".", 2)
            state.setdefault(int(idx), {})[name] = value
    for key, value in meta["scalars"].items():
        idx, name = key.split(".", 1)
        state.setdefault(int(idx), {})[name] = value
    opt.load_state_dict({"state": state, "param_groups": meta["param_groups"]})


def load_run(run: str | Path, device: str | torch.device = "cpu"):
    """Load a trained run: ``(model, cfg)`` with the best weights, in eval mode.

    Parameters
    ----------
    run : path
        A run folder written by ``kinecast fit``.
    device : str or torch.device
        Where to put the model.

    Examples
    --------
    >>> model, cfg = load_run("runs/pendulum")  # doctest: +SKIP
    """
    from ..model import build_model

    run = Path(run)
    check_run_folder(run)
    cfg = cfgmod.load(run / CONFIG)
    tensors, _ = load_tensors(run / WEIGHTS)
    model = build_model(cfg, channels_of(cfg))
    if "background" in tensors:
        model.set_background(tensors["background"])
    try:
        model.load_state_dict(tensors, strict=True)
    except RuntimeError as exc:
        first = str(exc).strip().splitlines()[0]
        raise KinecastError(run / WEIGHTS, f"weights do not match the run's config.toml ({first})") from None
    return model.to(device).eval(), cfg


def channels_of(cfg: cfgmod.Config) -> int:
    return 1 if cfg.data.color == "grey" else 3


def write_summary(run: Path, summary: dict) -> None:
    write_text(run / SUMMARY, json.dumps(summary, indent=2, sort_keys=True) + "\n")


def write_log(run: Path, rows: list[dict]) -> None:
    if not rows:
        return
    cols = list(dict.fromkeys(k for r in rows for k in r))
    lines = [",".join(cols)] + [",".join(_fmt(r.get(c, "")) for c in cols) for r in rows]
    write_text(run / LOG, "\n".join(lines) + "\n")


def read_log(run: Path) -> list[dict]:
    path = run / LOG
    if not path.is_file():
        return []
    lines = path.read_text().strip().splitlines()
    cols = lines[0].split(",")
    return [{c: float(v) for c, v in zip(cols, line.split(",")) if v != ""} for line in lines[1:]]


def _fmt(v) -> str:
    return f"{v:.6g}" if isinstance(v, float) else str(v)

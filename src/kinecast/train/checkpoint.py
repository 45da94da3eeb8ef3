"""What a resume checkpoint holds beyond the model: the optimiser's state as tensors plus JSON
scalars, and the metadata a resumed run needs (written by :class:`kinecast.train.loop.TrainState`).
The files themselves are the run folder's (:mod:`kinecast.runfolder`).
"""

from __future__ import annotations

from pathlib import Path

import torch

from ..errors import KinecastError
from ..runfolder import RESUME, load_tensors

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
    try:
        _restore_optimizer(opt, tensors, meta)
    except (KeyError, ValueError, TypeError, RuntimeError) as exc:
        raise KinecastError(RESUME, f"optimiser state does not match the model ({exc})") from None


def _restore_optimizer(opt: torch.optim.Optimizer, tensors: dict[str, torch.Tensor], meta: dict) -> None:
    state: dict[int, dict] = {}
    for key, value in tensors.items():
        if key.startswith("opt."):
            _, idx, name = key.split(".", 2)
            state.setdefault(int(idx), {})[name] = value
    for key, value in meta["scalars"].items():
        idx, name = key.split(".", 1)
        state.setdefault(int(idx), {})[name] = value
    opt.load_state_dict({"state": state, "param_groups": meta["param_groups"]})


# what a resume checkpoint's metadata must hold (written by train.loop.fit)
RESUME_META = ("step", "elapsed", "faults", "lr_scale", "curriculum", "optimizer", "sampler_rng",
               "paths")


def load_resume(run: Path) -> tuple[dict[str, torch.Tensor], dict]:
    """The resume checkpoint of ``run``, refused clearly when it lacks what resuming needs."""
    tensors, meta = load_tensors(run / RESUME)
    missing = [k for k in RESUME_META if k not in meta] + [k for k in ("rng.torch",) if k not in tensors]
    if missing:
        raise KinecastError(run / RESUME, f"not a kinecast resume checkpoint (no {', '.join(missing)})")
    return tensors, meta

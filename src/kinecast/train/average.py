"""An exponential moving average of the trained weights, the weights that are validated and kept.

The staged recipe's dynamics stage trains a Bayesian field whose gradient carries the noise of its
weight draws: at the stage's learning rate its posterior means wander from step to step, and in the
stage's first half a forecast from the weights of any one step was often two to three times worse
than one from their average over the last ~50 steps (DEVELOPERS.md, twenty-eighth session). Validation, the kept checkpoint and so
every forecast use the average; training goes on from the raw weights.

The decay ramps up as ``min(decay, (1 + n) / (10 + n))`` after ``n`` updates, so an average started
a few steps ago is not held back by the weights it started from (common practice; the same ramp as
TensorFlow's ``ExponentialMovingAverage`` with ``num_updates``).

References
----------
B. T. Polyak and A. B. Juditsky (1992). Acceleration of stochastic approximation by averaging.
SIAM J. Control Optim. 30(4), 838-855.
"""

from __future__ import annotations

from contextlib import contextmanager

import torch

__all__ = ["WeightAverage"]

PREFIX = "average."  # the average's keys in a resume checkpoint


class WeightAverage:
    """Exponential moving average of a model's parameters, started at a stage of training.

    Parameters
    ----------
    decay : float
        Weight of the old average at each update once the ramp is over; 0 = no average (every
        method then does nothing and :meth:`applied` leaves the model as it is).

    Examples
    --------
    >>> net = torch.nn.Linear(2, 1)
    >>> avg = WeightAverage(0.9)
    >>> avg.start(net, "dynamics")
    >>> with torch.no_grad():
    ...     _ = net.bias.add_(1.0)
    >>> avg.update(net)
    >>> before = float(net.bias.detach())
    >>> with avg.applied(net):
    ...     inside = float(net.bias.detach())
    >>> round(before - inside, 3), float(net.bias.detach()) == before  # the average lags 2/11 of the step
    (0.182, True)
    """

    def __init__(self, decay: float):
        self.decay = decay
        self.tensors: list[torch.Tensor] | None = None
        self.updates = 0
        self.stage: str | None = None  # the stage it was started in

    def start(self, model: torch.nn.Module, stage: str) -> None:
        """Start averaging from the model's weights now (a no-op when the decay is 0)."""
        if self.decay > 0:
            self.tensors = [p.detach().clone() for p in model.parameters()]
            self.updates, self.stage = 0, stage

    def update(self, model: torch.nn.Module) -> None:
        """Fold the model's weights after an optimiser step into the average."""
        if self.tensors is None:
            return
        self.updates += 1
        keep = min(self.decay, (1 + self.updates) / (10 + self.updates))
        with torch.no_grad():
            for a, p in zip(self.tensors, model.parameters()):
                a.lerp_(p.detach(), 1.0 - keep)

    @contextmanager
    def applied(self, model: torch.nn.Module):
        """The model holds the averaged weights inside the block, its own again after it."""
        if self.tensors is None:
            yield model
            return
        own = [p.detach().clone() for p in model.parameters()]
        self.adopt(model)
        try:
            yield model
        finally:
            with torch.no_grad():
                for p, w in zip(model.parameters(), own):
                    p.copy_(w)

    def adopt(self, model: torch.nn.Module) -> None:
        """Give the model the averaged weights for good (training goes on from them)."""
        if self.tensors is not None:
            with torch.no_grad():
                for p, a in zip(model.parameters(), self.tensors):
                    p.copy_(a)

    def state(self) -> tuple[dict[str, torch.Tensor], dict]:
        """``(tensors, meta)`` for a resume checkpoint."""
        tensors = {f"{PREFIX}{i}": a for i, a in enumerate(self.tensors or [])}
        return tensors, {"updates": self.updates, "stage": self.stage}

    def load(self, tensors: dict[str, torch.Tensor], meta: dict | None) -> None:
        """Restore what :meth:`state` gave (an older checkpoint without an average: none)."""
        found = sorted((int(k[len(PREFIX):]), v) for k, v in tensors.items() if k.startswith(PREFIX))
        self.tensors = [v.clone() for _, v in found] or None
        self.updates = (meta or {}).get("updates", 0)
        self.stage = (meta or {}).get("stage") if self.tensors is not None else None

"""The latent vector field: an MLP with mean-field Gaussian weights (or plain weights).

Second order: the state is ``y = [s, v]`` (each of size q); ``ds/dt = v`` and ``dv/dt = f_W(s, v)``.
First order: the state is ``z`` (size 2q) and ``dz/dt = f_W(z)``.

*Shared per object* (``group = g > 0``, second order only): s is q / g objects of g coordinates
each (keypoints: g = 2, image x and y); one MLP maps each object's own ``[s_j, v_j]`` to its own
acceleration ``a_j``. Several similar objects (pucks on a table) then share what one of them teaches
the field, where a field over all coordinates at once memorises the training layouts.

Weights follow q(W) = N(μ, σ²) per weight, prior N(0, prior_std²). :meth:`DynamicsField.sample`
draws the weights for one pass, which are then passed explicitly (``field(t, y, weights)``): one
independent draw per sequence (batched weight tensors, evaluated with ``torch.baddbmm``), or None
for the posterior means (a deterministic forecast).

References
----------
Blundell, C., Cornebise, J., Kavukcuoglu, K. and Wierstra, D. (2015). Weight Uncertainty in Neural
Networks. ICML.
"""

from __future__ import annotations

import math

import torch
from torch import nn

from .gauss import kl_normal_prior

# Per-layer (weights [n, in, out], biases [n, 1, out]) drawn for a batch of n sequences.
Weights = list[tuple[torch.Tensor, torch.Tensor]]

ACTIVATIONS = {"tanh": torch.tanh, "relu": torch.relu, "softplus": torch.nn.functional.softplus}
# The last layer's initial means are scaled by this: the starting field is gentle, so early latent
# trajectories stay bounded while the decoder learns.
LAST_LAYER_GAIN = 0.1


class DynamicsField(nn.Module):
    """MLP vector field with Gaussian (``bayesian=True``) or plain weights.

    Parameters
    ----------
    q : int
        Latent position size; the state has size 2q.
    hidden, hidden_layers : int
        Width and number of hidden layers.
    second_order : bool
        If True the MLP maps [s, v] → acceleration (size q) and the field returns [v, a];
        otherwise it maps z → dz/dt (size 2q).
    bayesian : bool
        Mean-field Gaussian weights with a KL term; else plain weights and ``kl() == 0``.
    prior_std, init_logstd : float
        Prior standard deviation, and the initial log σ of every weight.
    activation : str
        Hidden activation, a key of :data:`ACTIVATIONS` (``relu`` forms the steep walls of impacts).
    group : int
        0: one MLP over the whole state. g > 0 (second order): one MLP shared by the q / g objects
        of g coordinates each, ``[s_j, v_j]`` (2g) → ``a_j`` (g).

    Examples
    --------
    >>> f = DynamicsField(2, 16, 2, True, True, 1.0, -5.0)
    >>> w = f.sample(3)  # one weight draw per sequence
    >>> f(torch.tensor(0.0), torch.zeros(3, 4), w).shape
    torch.Size([3, 4])
    >>> g = DynamicsField(4, 16, 2, True, True, 1.0, -5.0, group=2)
    >>> g(torch.tensor(0.0), torch.zeros(3, 8)).shape  # posterior means
    torch.Size([3, 8])
    """

    def __init__(self, q: int, hidden: int, hidden_layers: int, second_order: bool, bayesian: bool,
                 prior_std: float, init_logstd: float, activation: str = "tanh", group: int = 0):
        super().__init__()
        if group and (not second_order or q % group):
            raise ValueError(f"DynamicsField: a shared per-object field needs second order and q ({q}) "
                             f"a multiple of the group size ({group})")
        self.act = ACTIVATIONS[activation]
        self.q = q
        self.second_order = second_order
        self.bayesian = bayesian
        self.prior_std = float(prior_std)
        self.group = int(group)
        width = self.group or q  # position coordinates seen by one evaluation of the MLP
        sizes = [2 * width] + [hidden] * hidden_layers + [width if second_order else 2 * width]
        self.w_mu = nn.ParameterList()
        self.b_mu = nn.ParameterList()
        self.w_logstd = nn.ParameterList()
        self.b_logstd = nn.ParameterList()
        for i, (n_in, n_out) in enumerate(zip(sizes[:-1], sizes[1:])):
            # Glorot-style uniform init for tanh layers, He-style (×√2) for ReLU-like ones (common practice)
            gain = LAST_LAYER_GAIN if i == len(sizes) - 2 else (1.0 if activation == "tanh" else math.sqrt(2))
            bound = math.sqrt(6.0 / (n_in + n_out)) * gain
            self.w_mu.append(nn.Parameter(torch.empty(n_in, n_out).uniform_(-bound, bound)))
            self.b_mu.append(nn.Parameter(torch.zeros(n_out)))
            if bayesian:
                self.w_logstd.append(nn.Parameter(torch.full((n_in, n_out), float(init_logstd))))
                self.b_logstd.append(nn.Parameter(torch.full((n_out,), float(init_logstd))))
        # 1 for a position coordinate the field moves, 0 for one held still (second order: its
        # acceleration is zero; the model also zeroes its initial velocity). See hold_still.
        self.register_buffer("moving", torch.ones(q))

    def sample(self, n: int, mean: bool = False, generator: torch.Generator | None = None) -> Weights | None:
        """Weights for a solve, passed explicitly to :meth:`forward` (the field keeps no draw).

        Parameters
        ----------
        n : int
            Number of sequences in the state batch; each gets its own weight draw.
        mean : bool
            Use the posterior means (deterministic); always the case for plain weights.
        generator : torch.Generator, optional
            Source of the weight noise (for reproducible samples).

        Returns
        -------
        list of (Tensor, Tensor) or None
            Per layer, weights [n, in, out] and biases [n, 1, out]; None means the posterior means.
        """
        if mean or not self.bayesian:
            return None
        drawn = []
        for w_mu, b_mu, w_ls, b_ls in zip(self.w_mu, self.b_mu, self.w_logstd, self.b_logstd):
            ew = torch.randn((n, *w_mu.shape), generator=generator, device=w_mu.device, dtype=w_mu.dtype)
            eb = torch.randn((n, 1, b_mu.shape[0]), generator=generator, device=b_mu.device,
                             dtype=b_mu.dtype)
            drawn.append((w_mu + w_ls.exp() * ew, b_mu + b_ls.exp() * eb))
        return drawn

    def tensors(self, weights: Weights | None = None) -> list[torch.Tensor]:
        """The tensors a solve with ``weights`` depends on (for adjoint gradients)."""
        if weights is None:
            return list(self.w_mu) + list(self.b_mu)
        return [x for pair in weights for x in pair]

    def _objects(self, x: torch.Tensor) -> torch.Tensor:
        """(n, 2q) → (n, G, MLP input): one row per object, or one row of the whole state."""
        if not self.group:
            return x.unsqueeze(1)
        n, g = x.shape[0], self.group
        s, v = x[:, :self.q].reshape(n, -1, g), x[:, self.q:].reshape(n, -1, g)
        return torch.cat([s, v], dim=2)

    def _from_objects(self, g: torch.Tensor, n: int) -> torch.Tensor:
        """The transpose of :meth:`_objects`: a gradient (n, G, MLP input) on its rows → (n, 2q)."""
        if not self.group:
            return g[:, 0]
        k = self.group
        return torch.cat([g[..., :k].reshape(n, -1), g[..., k:].reshape(n, -1)], dim=1)

    def mlp(self, x: torch.Tensor, weights: Weights | None = None, keep: list | None = None) -> torch.Tensor:
        """The MLP on a batch ``x`` of shape (n, 2q) with ``weights`` (from :meth:`sample`; None: the
        posterior means), per object if grouped. With drawn weights and a list ``keep``, appends
        the list of every layer's input (the rows, then each hidden layer's output) to it, for a
        hand-written backward (:mod:`kinecast.model.fused_rk4`)."""
        n_layers = len(self.w_mu)
        n = x.shape[0]
        x = self._objects(x)
        if weights is None:
            for i, (w, b) in enumerate(zip(self.w_mu, self.b_mu)):
                x = torch.matmul(x, w) + b
                if i < n_layers - 1:
                    x = self.act(x)
            return x.reshape(n, -1)
        if n != weights[0][0].shape[0]:
            raise ValueError(f"DynamicsField: state batch {n} but weights drawn for "
                             f"{weights[0][0].shape[0]} sequences")
        inputs = [] if keep is not None else None  # nothing kept on a rollout or torchdiffeq's path
        for i, (w, b) in enumerate(weights):
            if inputs is not None:
                inputs.append(x)
            x = torch.baddbmm(b, x, w)
            if i < n_layers - 1:
                x = self.act(x)
        if keep is not None:
            keep.append(inputs)
        return x.reshape(n, -1)

    def forward(self, t: torch.Tensor, y: torch.Tensor, weights: Weights | None = None,
                keep: list | None = None) -> torch.Tensor:
        """dy/dt at state ``y`` (n, 2q) with ``weights`` (None: the posterior means); autonomous, so
        ``t`` is unused. ``keep``: see :meth:`mlp`."""
        out = self.mlp(y, weights, keep)
        if self.second_order:
            return torch.cat([y[:, self.q:], out * self.moving], dim=1)
        return out

    def kl(self) -> torch.Tensor:
        """KL(q(W) ‖ p(W)) summed over every weight and bias (0 for plain weights)."""
        if not self.bayesian:
            return self.w_mu[0].new_zeros(())
        total = self.w_mu[0].new_zeros(())
        for mu, ls in zip(list(self.w_mu) + list(self.b_mu), list(self.w_logstd) + list(self.b_logstd)):
            total = total + kl_normal_prior(mu, ls, self.prior_std).sum()
        return total

"""Closed-form Gaussian KL divergences and the two pixel likelihoods of the ELBO.

Every function here works on whole tensors (no loops) and returns per-element terms; the caller
sums over the axes it needs.

References
----------
Kingma, D. P. and Welling, M. (2014). Auto-Encoding Variational Bayes. ICLR. (Appendix B: the KL
divergence between a diagonal Gaussian and N(0, I).)
Blundell, C. et al. (2015). Weight Uncertainty in Neural Networks. ICML. (Mean-field Gaussian
weights with a Gaussian prior.)
"""

from __future__ import annotations

import math

import torch
import torch.nn.functional as F

HALF_LOG_2PI = 0.5 * math.log(2.0 * math.pi)  # fixed fact: normaliser of the Gaussian density


def kl_std_normal(mean: torch.Tensor, logvar: torch.Tensor) -> torch.Tensor:
    """Per-element KL( N(mean, exp(logvar)) ‖ N(0, 1) ).

    Parameters
    ----------
    mean, logvar : Tensor
        Mean and log-variance of the diagonal Gaussian (same shape).

    Returns
    -------
    Tensor
        ``0.5 * (exp(logvar) + mean² − 1 − logvar)``, same shape as ``mean``.

    Examples
    --------
    >>> float(kl_std_normal(torch.zeros(1), torch.zeros(1)))
    0.0
    """
    return 0.5 * (logvar.exp() + mean.pow(2) - 1.0 - logvar)


def kl_normal_prior(mu: torch.Tensor, logstd: torch.Tensor, prior_std: float) -> torch.Tensor:
    """Per-element KL( N(mu, exp(logstd)²) ‖ N(0, prior_std²) ).

    Parameters
    ----------
    mu, logstd : Tensor
        Posterior mean and log standard deviation of each weight.
    prior_std : float
        Standard deviation of the zero-mean Gaussian prior.

    Returns
    -------
    Tensor
        ``log(prior_std) − logstd + (σ² + mu²) / (2 prior_std²) − 1/2``, same shape as ``mu``.
    """
    var = (2.0 * logstd).exp()
    return math.log(prior_std) - logstd + (var + mu.pow(2)) / (2.0 * prior_std ** 2) - 0.5


def bernoulli_nll(logits: torch.Tensor, target: torch.Tensor) -> torch.Tensor:
    """Per-pixel negative log-likelihood of intensities in [0, 1] under Bernoulli(sigmoid(logits)).

    Intensities between 0 and 1 are used as soft targets (binary cross-entropy), common practice for
    image VAEs; the normaliser of the continuous Bernoulli is left out.
    """
    return F.binary_cross_entropy_with_logits(logits, target, reduction="none")


def gaussian_nll(mean: torch.Tensor, target: torch.Tensor, logstd: torch.Tensor) -> torch.Tensor:
    """Per-pixel negative log-density of ``target`` under N(mean, exp(logstd)²).

    ``logstd`` broadcasts against ``mean`` (for example one learned value per channel).
    """
    return 0.5 * ((target - mean) * torch.exp(-logstd)).pow(2) + logstd + HALF_LOG_2PI

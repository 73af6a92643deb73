"""Binomial family (logit link) on records: successes and trials per cell and covariate pattern.

Rows i of a record r (one cell, one covariate pattern) share the success probability
``p_r = logistic(eta_r)``, so

    sum_i log Binom(y_i | n_i, p_r) = Y_r eta_r - N_r log(1 + exp(eta_r)) + sum_i log C(n_i, y_i),

with ``Y_r`` the successes and ``N_r`` the trials of the record: the likelihood depends on the rows
only through (Y_r, N_r), up to the parameter-free last term. A 0/1 outcome is the case n_i = 1.

``eta_r`` is built in :mod:`bayesdid.model.families` (shared terms, shock and gap noise,
covariates). :func:`record_loglik` is written against an array namespace, so numpy (tests, draws)
and PyTensor (the model) share it.
"""

from __future__ import annotations

__all__ = ["record_loglik", "inverse_link", "LINK"]

LINK = "logit"


def record_loglik(y, size, eta, xp):
    """Log-likelihood of each record up to a parameter-free constant: ``Y eta - N softplus(eta)``."""
    return y * eta - size * xp.softplus(eta)


def inverse_link(eta, xp):
    """Success probability ``1 / (1 + exp(-eta))``."""
    return xp.expit(eta)

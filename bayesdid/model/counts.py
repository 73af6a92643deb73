"""Count families (log link, exposure offset) on records: events and exposure per cell and pattern.

**poisson.** Rows i of a record r share the rate ``lambda_r = exp(eta_r)`` per unit of exposure, so

    sum_i log Poisson(y_i | E_i lambda_r) = Y_r eta_r - E_r exp(eta_r) + sum_i (y_i log E_i - log y_i!),

with ``Y_r`` the events and ``E_r`` the exposure of the record: exact on (Y_r, E_r) up to the
parameter-free last term.

**negbinomial.** Over-dispersion beyond the shock and the gap noise: every cell c carries a
multiplier ``u_c ~ Gamma(phi, phi)`` (mean 1, variance 1/phi) shared by all its rows, and given it the
rows are Poisson with mean ``E_i lambda_r u_c``. Integrating u_c out gives, per cell,

    sum_r Y_r eta_r + lgamma(Y_c + phi) - lgamma(phi) + phi log phi - (Y_c + phi) log(M_c + phi)
        + sum_i (y_i log E_i - log y_i!),        M_c = sum_r E_r exp(eta_r),

exact on the records up to the parameter-free last term. With one row per cell (aggregated data)
this is the usual negative binomial (NB2) regression, variance mu + mu^2 / phi; with many rows per
cell it is its cell-level version, which is what keeps the collapse exact (a row-level NB2 has no
sufficient statistic). The prior is on ``dispersion = 1/sqrt(phi)`` (half-normal, scale
``priors.dispersion``).

Both are written against an array namespace so numpy and PyTensor share them.
"""

from __future__ import annotations

__all__ = ["poisson_loglik", "negbinomial_loglik", "inverse_link", "LINK"]

LINK = "log"


def poisson_loglik(y, size, eta, xp):
    """Per-record log-likelihood up to a parameter-free constant: ``Y eta - E exp(eta)``."""
    return y * eta - size * xp.exp(eta)


def negbinomial_loglik(y, size, eta, phi, *, cell, first, y_cell, n_cells, xp):
    """Per-record terms whose sum over a cell is the cell's log-likelihood (constant dropped).

    ``cell`` maps each record to its cell (0..n_cells-1), ``first`` is 1 on one record per cell
    (which carries the cell-level term) and ``y_cell`` the cell's event total on every record.
    """
    mu = size * xp.exp(eta)
    m_cell = xp.segment_sum(mu, cell, n_cells)
    M = xp.take_last(m_cell, cell)
    term = xp.gammaln(y_cell + phi) - xp.gammaln(phi) + phi * xp.log(phi) - (y_cell + phi) * xp.log(M + phi)
    return y * eta + first * term


def inverse_link(eta, xp):
    """Rate per unit of exposure ``exp(eta)``."""
    return xp.exp(eta)

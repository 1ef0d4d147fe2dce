"""Empirical-Bayes site harmonisation (Johnson, Li & Rabinovic 2007) of subjects' maps.

Pure maths: arrays in, arrays out. Each voxel is a "feature" and each site a
"batch" in the paper's terms. Site-specific location (additive) and scale
(multiplicative) effects are estimated per voxel, shrunk towards their
across-voxel distribution by empirical Bayes, and removed, while the effects
of the covariates of interest (the group design's model columns and
covariates) are preserved.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from .errors import GroupError

FloatArray = npt.NDArray[np.float64]


@dataclass(frozen=True)
class SiteHarmonisation:
    """Result of :func:`harmonise_site_effects`.

    Attributes
    ----------
    adjusted : ndarray, shape (n_subjects, n_voxels)
        Harmonised effects.
    levels : list of str
        Sites, in the row order of the arrays below.
    location : ndarray, shape (n_sites, n_voxels)
        Shrunken additive site effects gamma* (standardised units).
    scale : ndarray, shape (n_sites, n_voxels)
        Shrunken multiplicative site effects delta*^2 (standardised units).
    n_iterations : int
        Iterations of the empirical-Bayes fixed point.
    effect_scale : ndarray, shape (n_subjects, n_voxels)
        The factor each subject's deviation from the site model was multiplied
        by: 1 / sqrt(delta*^2) of its site (1 where the voxel was left as is).
        The variance of a harmonised effect is the first-level variance times
        ``effect_scale ** 2`` (see :func:`harmonise_variances`).
    """

    adjusted: FloatArray
    levels: list[str]
    location: FloatArray
    scale: FloatArray
    n_iterations: int
    effect_scale: FloatArray


def standardise_by_site(Y: FloatArray, site_matrix: FloatArray, covariates: FloatArray
                        ) -> tuple[FloatArray, FloatArray, FloatArray]:
    """Standardise the data after removing the fitted site and covariate model.

    Parameters
    ----------
    Y : ndarray, shape (n_subjects, n_voxels)
    site_matrix : ndarray, shape (n_subjects, n_sites)
        Full (0/1) site indicators.
    covariates : ndarray, shape (n_subjects, n_covariates)
        Centred covariates of interest (no constant column).

    Returns
    -------
    Z : ndarray, shape (n_subjects, n_voxels)
        (Y - alpha - C beta) / sigma.
    standard_mean : ndarray, shape (n_subjects, n_voxels)
        alpha + C beta: the part of the model kept after harmonisation.
    sigma : ndarray, shape (n_voxels,)
        Pooled residual standard deviation.

    Notes
    -----
    Johnson, Li & Rabinovic (2007) eq. 2.2: fit Y = S gamma + C beta by least
    squares, alpha = sum_i (n_i / n) gamma_i, sigma^2 = mean((Y - S gamma - C beta)^2).
    """
    B = np.column_stack([site_matrix, covariates])
    coef = np.linalg.lstsq(B, Y, rcond=None)[0]
    k = site_matrix.shape[1]
    weights = site_matrix.sum(axis=0) / site_matrix.shape[0]
    alpha = weights @ coef[:k]
    standard_mean = alpha[None, :] + covariates @ coef[k:]
    resid = Y - B @ coef
    sigma = np.sqrt(np.mean(resid**2, axis=0))
    safe = np.where(sigma > 0, sigma, 1.0)
    return (Y - standard_mean) / safe, standard_mean, sigma


def estimate_site_priors(gamma_hat: FloatArray, delta2_hat: FloatArray
                         ) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray]:
    """Hyper-parameters of the site priors by the method of moments over voxels.

    Parameters
    ----------
    gamma_hat : ndarray, shape (n_sites, n_voxels)
        Site means of the standardised data.
    delta2_hat : ndarray, shape (n_sites, n_voxels)
        Site variances (ddof = 1) of the standardised data.

    Returns
    -------
    gamma_bar, tau2, lambda_, theta : ndarray, shape (n_sites,)

    Notes
    -----
    gamma ~ N(gamma_bar, tau^2); delta^2 ~ InverseGamma(lambda, theta) with
    lambda = (2 s^2 + m^2) / s^2 and theta = (m s^2 + m^3) / s^2, m and s^2 the
    mean and variance of delta2_hat over voxels (Johnson et al. 2007, sec. 3.1).
    """
    gamma_bar = gamma_hat.mean(axis=1)
    tau2 = gamma_hat.var(axis=1, ddof=1)
    m = delta2_hat.mean(axis=1)
    s2 = delta2_hat.var(axis=1, ddof=1)
    lambda_ = (2.0 * s2 + m**2) / s2
    theta = (m * s2 + m**3) / s2
    return gamma_bar, tau2, lambda_, theta


def shrink_site_effects(Z: FloatArray, site_matrix: FloatArray, max_iter: int = 1000, tol: float = 1e-6
                        ) -> tuple[FloatArray, FloatArray, int]:
    """Empirical-Bayes posterior estimates of site location and scale per voxel.

    Parameters
    ----------
    Z : ndarray, shape (n_subjects, n_voxels)
        Standardised data.
    site_matrix : ndarray, shape (n_subjects, n_sites)
        Full (0/1) site indicators.
    max_iter : int
    tol : float
        Stop when the largest relative change of gamma* and delta*^2 is below ``tol``.

    Returns
    -------
    gamma_star, delta2_star : ndarray, shape (n_sites, n_voxels)
    n_iterations : int

    Notes
    -----
    Iterate (Johnson et al. 2007, eqs. 3.1-3.2)
    gamma* = (n_i tau^2 gamma_hat + delta*^2 gamma_bar) / (n_i tau^2 + delta*^2),
    delta*^2 = (theta + sum_j (Z_ij - gamma*)^2 / 2) / (n_i / 2 + lambda - 1),
    starting from delta*^2 = delta2_hat.
    """
    n_site = site_matrix.sum(axis=0)
    gamma_hat = (site_matrix.T @ Z) / n_site[:, None]
    sq = site_matrix.T @ Z**2
    delta2_hat = (sq - n_site[:, None] * gamma_hat**2) / (n_site[:, None] - 1)
    gamma_bar, tau2, lambda_, theta = estimate_site_priors(gamma_hat, delta2_hat)
    g, d2 = gamma_hat, delta2_hat
    n_col = n_site[:, None]
    iteration = 0
    for iteration in range(1, max_iter + 1):
        g_new = (n_col * tau2[:, None] * gamma_hat + d2 * gamma_bar[:, None]) / (n_col * tau2[:, None] + d2)
        ss = sq - 2.0 * g_new * (site_matrix.T @ Z) + n_col * g_new**2
        d2_new = (theta[:, None] + 0.5 * ss) / (n_col / 2.0 + lambda_[:, None] - 1.0)
        change = max(np.max(np.abs(g_new - g) / np.maximum(np.abs(g), 1e-12)),
                     np.max(np.abs(d2_new - d2) / np.maximum(np.abs(d2), 1e-12)))
        g, d2 = g_new, d2_new
        if change < tol:
            break
    return g, d2, iteration


def harmonise_site_effects(Y: FloatArray, sites: Sequence[object], covariates: FloatArray | None = None,
                           max_iter: int = 1000, tol: float = 1e-6) -> SiteHarmonisation:
    """Remove site location and scale effects, keeping the covariates of interest.

    Parameters
    ----------
    Y : ndarray, shape (n_subjects, n_voxels)
        Subjects' effect maps (finite; at least 2 voxels).
    sites : sequence, length n_subjects
        Site label of each subject (compared as text); every site needs >= 2 subjects.
    covariates : ndarray, shape (n_subjects, n_covariates), optional
        Effects to preserve (group indicators, ages, ...). They are centred and
        any constant column is dropped (the site indicators carry the mean).
    max_iter, tol
        See :func:`shrink_site_effects`.

    Returns
    -------
    SiteHarmonisation

    Notes
    -----
    Y* = sigma / sqrt(delta*^2) (Z - gamma*) + alpha + C beta
    (Johnson, Li & Rabinovic 2007, Biostatistics 8:118, eq. 3.3).
    """
    Y = np.asarray(Y, dtype=np.float64)
    labels = np.array([str(s) for s in sites], dtype=object)
    levels = sorted(set(labels.tolist()))
    if len(levels) < 2:
        raise GroupError(f"site harmonisation: one site ({levels}) among the kept subjects; "
                         "set harmonise_sites: false")
    counts = {lev: int(np.sum(labels == lev)) for lev in levels}
    small = [lev for lev, n in counts.items() if n < 2]
    if small:
        raise GroupError(f"site harmonisation: site(s) {small} have fewer than 2 kept subjects ({counts}); "
                         "merge or drop those sites, or set harmonise_sites: false")
    if Y.shape[1] < 3:
        raise GroupError(f"site harmonisation: {Y.shape[1]} voxel(s) in the group mask; at least 3 are needed "
                         "to estimate the priors")
    S = np.column_stack([(labels == lev).astype(np.float64) for lev in levels])
    C = np.zeros((Y.shape[0], 0)) if covariates is None else np.asarray(covariates, dtype=np.float64)
    C = C - C.mean(axis=0) if C.size else C
    if C.size:
        C = C[:, np.ptp(C, axis=0) > 0]
    Z, standard_mean, sigma = standardise_by_site(Y, S, C)
    gamma_star, delta2_star, n_iter = shrink_site_effects(Z, S, max_iter=max_iter, tol=tol)
    per_subject_gamma = S @ gamma_star
    per_subject_delta = np.sqrt(S @ delta2_star)
    adjusted = sigma[None, :] * (Z - per_subject_gamma) / per_subject_delta + standard_mean
    kept = sigma[None, :] > 0
    adjusted = np.where(kept, adjusted, Y)
    effect_scale = np.where(kept, 1.0 / per_subject_delta, 1.0)
    return SiteHarmonisation(adjusted=adjusted, levels=levels, location=gamma_star, scale=delta2_star,
                             n_iterations=n_iter, effect_scale=effect_scale)


def harmonise_variances(V: FloatArray, harmonisation: SiteHarmonisation) -> FloatArray:
    """First-level variances in the units of the harmonised effects.

    Parameters
    ----------
    V : ndarray, shape (n_subjects, n_voxels)
        Variances of the effects that were harmonised.
    harmonisation : SiteHarmonisation
        The result of :func:`harmonise_site_effects` on those effects.

    Returns
    -------
    ndarray, shape (n_subjects, n_voxels)
        ``V * effect_scale ** 2``.

    Notes
    -----
    The harmonised effect is y* = (y - m - sigma gamma*) / sqrt(delta*^2) + m,
    an affine map of y with slope 1 / sqrt(delta*^2) (Johnson, Li & Rabinovic
    2007, eq. 3.3, site estimates held fixed), so var(y*) = var(y) / delta*^2.
    Without this the mixed-effects weights 1 / (V + tau^2) would mix
    harmonised effects with variances in the units before harmonisation.
    """
    V = np.asarray(V, dtype=np.float64)
    if V.shape != harmonisation.effect_scale.shape:
        raise ValueError(f"variances {V.shape} and harmonised effects {harmonisation.effect_scale.shape} differ")
    return V * harmonisation.effect_scale**2

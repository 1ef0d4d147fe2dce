"""Voxelwise GLM estimation: scaling, OLS, autocorrelation estimates, prewhitened refits.

A package along the four sections of the maths: :mod:`.ols` (deterministic
products over voxels, scaling, design factors, OLS), :mod:`.autocorrelation`
(residual lag products, Worsley's moments taken at every lag, the ratio and
curvature corrections, Yule-Walker), :mod:`.smoothing` (normalised Gaussian
smoothing within the mask and within tissue classes) and :mod:`.whitening`
(bins, exact AR whitening, the prewhitened refit). Every public name is
re-exported here (``from glmsteps import estimation as est``).

Pure maths: arrays in, arrays out, no file access. Every function that touches
voxel data takes a *block* of voxels (``Y (n_scans, n_voxels)``); the loop over
blocks (chunks) lives in :mod:`glmsteps.fitting`. Results do not depend on how
the voxels are split into blocks: matrix products over voxels go through
:func:`multiply_columns`, which pads the voxel axis to a fixed multiple and
hands BLAS a C-ordered operand so that the kernel computing each column is
always the same, per-voxel small matrix products are element-wise
(:func:`apply_group_matrices`), and per-voxel reductions run along the scan
axis only.

The fitting model, per voxel, is ``y = X beta + e`` with ``e`` zero-mean and
correlation matrix ``V``:

``ols``
    ``V = I``; ordinary least squares through the pseudo-inverse of ``X``.
``ar1``
    ``V`` of a stationary AR(1) process. The lag-1 autocorrelation of each
    voxel is estimated from its OLS residuals (:func:`estimate_autocorrelation`),
    smoothed, rounded to bins, and each bin is refitted with the exact AR(1)
    whitening (Prais-Winsten, the first scan kept) from sufficient statistics.
``arp``
    AR(p), p <= ``MAX_AR_ORDER``: autocorrelations at lags 1..p estimated the
    same way, smoothed, binned on lag 1 (each bin's model the mean of its
    voxels' autocorrelations), Yule-Walker coefficients (Levinson-Durbin), and
    each bin refitted with the exact AR(p) whitening.

Censored volumes
    A censored volume carries its own regressor (role ``spike``: a column that
    is 1 at that volume and 0 elsewhere). For any correlation matrix ``V``,
    generalised least squares with such an indicator column gives exactly the
    same estimates of the other regressors, and the same residual sum of
    squares, as generalised least squares on the kept volumes alone with their
    marginal correlation matrix (for AR(1): ``rho ** |t_i - t_j|`` over the
    kept scan times, i.e. the gaps are treated as missing scans, not closed
    up). So whitening is applied to the full series including the indicator
    columns, and the degrees of freedom are ``n_scans - rank(X)``, which counts
    every censored volume as lost. In the OLS residuals used for the
    autocorrelation estimate the censored volumes are set to exactly zero, so
    they drop out of every lag product, and Worsley's correction (which is
    computed from the residual-forming matrix of the full design, indicator
    columns included) accounts for the missing products. After the fit, the
    coefficient of each indicator column is set to the value that makes the
    residual at its volume zero (``y_k - x_k' beta`` over the other columns).
    Indicator coefficients are nuisance values, not for inference.

Dropped initial volumes are simply absent: ``X`` and ``Y`` start at the first
kept volume, and the whitening treats that volume as the start of the series.
"""

from __future__ import annotations

from typing import Literal

from .autocorrelation import (MAX_ABS_RHO, MAX_AR_ORDER, MIN_BIAS_MATRIX_RCOND, MIN_DOF_PER_AR_COEFFICIENT,
                              REFERENCE_GROUP_WIDTH, AutocorrelationEstimate,
                              ar_autocorrelation, autocorrelation_of_ar, check_ar_order, compute_lag_moments,
                              compute_lag_products, compute_ratio_moments, estimate_autocorrelation,
                              extend_autocorrelation, levinson_durbin, truncated_autocorrelation)
from .ols import (DesignFactors, FloatArray, OlsBlock, ScalingMethod, apply_group_matrices, compute_scale_factors,
                  fit_ols, multiply_columns, prepare_design)
from .smoothing import (DEFAULT_SMOOTHING_VOXELS, convolve_axis, default_smoothing_fwhm_mm, gaussian_kernel,
                        smooth_voxel_values)
from .whitening import (Ar1Summary, NoiseBins, WhitenedBlock, assign_bins, bin_means, fit_ar1_block, fit_ar1_summary,
                        fit_arp_summary, prepare_bins, summarise_residuals, whiten_ar, whitened_covariance)

#: The run-level autocorrelation models (``fit.autocorrelation``).
AutocorrelationModel = Literal["ols", "ar1", "arp"]

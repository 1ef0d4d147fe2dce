"""Voxelwise GLM estimation: scaling, OLS, autocorrelation estimates, prewhitened refits.

Pure maths: arrays in, arrays out, no file access. Every function that touches
voxel data takes a *block* of voxels (``Y (n_scans, n_voxels)``); the loop over
blocks (chunks) lives in the I/O layer (``glmsteps.jobs.fit``). Results do not
depend on how the voxels are split into blocks: matrix products over voxels go
through :func:`multiply_columns`, which pads the voxel axis to a fixed multiple
so that the BLAS kernel computing each column is always the same, and per-voxel
reductions run along the scan axis only.

The fitting model, per voxel, is ``y = X beta + e`` with ``e`` zero-mean and
correlation matrix ``V``:

``ols``
    ``V = I``; ordinary least squares through the pseudo-inverse of ``X``.
``ar1``
    ``V`` of a stationary AR(1) process with coefficient ``rho``. ``rho`` is
    estimated per voxel from the OLS residuals with Worsley's bias correction
    (the lag-1/lag-0 residual ratio mapped through its expectation under AR(1)
    noise for this design, :func:`compute_ar1_correction`),
    optionally smoothed within the mask, rounded to bins of width 0.01, and
    each bin is refitted with the exact AR(1) whitening (Prais-Winsten, the
    first scan kept).
``arp``
    AR(q), q <= 4, from the residual autocorrelations corrected with Worsley's
    linear system (:func:`compute_bias_matrix`, first-order in the lags) by
    Yule-Walker (Levinson-Durbin), binned on the lag-1 autocorrelation, and
    refitted with the exact AR(q) whitening.

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
    residual at its volume zero (``y_k - x_k' beta`` over the other columns);
    :func:`compute_residuals` returns exactly zero there. Indicator
    coefficients are nuisance values, not for inference.

Dropped initial volumes are simply absent: ``X`` and ``Y`` start at the first
kept volume, and the whitening treats that volume as the start of the series.
"""

from __future__ import annotations

from typing import Literal

from .autocorrelation import (MAX_ABS_RHO, MAX_AR_ORDER, MIN_BIAS_MATRIX_RCOND, MIN_DOF_PER_AR_COEFFICIENT,
                              REFERENCE_GROUP_WIDTH, REFERENCE_SMOOTHING_FWHM_MM, AutocorrelationEstimate,
                              ar_autocorrelation, autocorrelation_of_ar, check_ar_order, compute_lag_moments,
                              compute_lag_products, compute_ratio_moments, estimate_autocorrelation,
                              extend_autocorrelation, levinson_durbin, truncated_autocorrelation)
from .ols import (DesignFactors, FloatArray, OlsBlock, ScalingMethod, compute_residuals, compute_scale_factors,
                  apply_group_matrices, fit_ols, multiply_columns, prepare_design)
from .smoothing import convolve_axis, gaussian_kernel, smooth_voxel_values, smooth_within_mask
from .whitening import (Ar1Summary, NoiseBins, WhitenedBlock, assign_bins, bin_means, fit_ar1_block, fit_ar1_summary,
                        fit_arp_block, prepare_bins, summarise_residuals, whiten_ar, whitened_covariance)

NoiseModel = Literal["ols", "ar1", "arp"]

"""Group-level models over subjects' contrast maps (pure maths, no file access).

The group model is a summary-statistics GLM: each subject contributes one
effect per voxel (and, for the mixed-effects estimators, its first-level
variance). Arrays follow the project's conventions: ``X (n_subjects,
n_regressors)``, ``Y (n_subjects, n_voxels)``, ``V (n_subjects, n_voxels)``
first-level variances, ``c (n_regressors,)``.

Design coding (the column names group contrasts refer to)
---------------------------------------------------------
``one_sample``
    ``mean`` (a column of ones).
``two_sample``
    Cell means: one indicator ``<group_column>[<level>]`` per level of the
    group column (two or more levels, sorted as text); no ``mean`` column.
    The group difference is ``{"group[patient]": 1, "group[control]": -1}``.
``paired``
    ``<group_column>[<level>]`` for the second level (levels sorted as text;
    the first is the reference), coded 1/0, plus one indicator
    ``<pair_column>[<pair>]`` per pair. ``pair_column`` holds a label shared
    by the two members of a pair (e.g. a family or a person scanned twice
    under two participant labels); each pair must hold exactly two subjects
    with the two different group levels. The beta of the group column is the
    mean within-pair difference (second level minus reference).
``regression``
    ``mean`` plus the covariates.

Covariates (and the site column when ``site_as_covariate``) follow the model
columns. A numeric column is mean-centred and keeps its name (``age``). A
categorical column (text, or the site column whatever its type) becomes one
indicator per level except the first (sorted as text), named
``<column>[<level>]`` (``site[b]``), and each indicator is mean-centred.
Centring keeps ``mean`` (and the cell means) equal to the subjects' average
adjusted to the covariates' sample means, while each indicator's beta is the
difference of its level from the reference level.

Missing values at a voxel
-------------------------
:func:`fit_contrast_with_missing` groups voxels by the set of subjects that
are finite there and fits each set with the rows of the absent subjects
dropped; the dof then varies over voxels (n_present - rank). A voxel whose
reduced design cannot estimate the contrast is left NaN.
"""

from __future__ import annotations

import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Literal

import numpy as np
import numpy.typing as npt
import pandas as pd

from .errors import GroupError, GlmstepsWarning

DesignKind = Literal["one_sample", "two_sample", "paired", "regression"]
Estimation = Literal["ols", "mixed_reml", "mixed_dl"]
DESIGNS: tuple[str, ...] = ("one_sample", "two_sample", "paired", "regression")
ESTIMATIONS: tuple[str, ...] = ("ols", "mixed_reml", "mixed_dl")

FloatArray = npt.NDArray[np.float64]


@dataclass(frozen=True)
class GroupDesign:
    """A group design matrix and its column metadata.

    Attributes
    ----------
    matrix : ndarray, shape (n_subjects, n_regressors), float64
    names : list of str, length n_regressors
        Column names used by group contrasts.
    roles : list of str, length n_regressors
        ``model`` (mean, group or paired columns), ``covariate``, ``site`` or ``pair``.
    blocks : ndarray of int, shape (n_subjects,)
        Sign-flip block of each subject: its pair for ``paired`` designs, its own
        row otherwise (used by the permutation test).
    """

    matrix: FloatArray
    names: list[str]
    roles: list[str]
    blocks: npt.NDArray[np.int64]


@dataclass(frozen=True)
class ContrastFit:
    """A group contrast estimated at every voxel.

    Attributes
    ----------
    effect : ndarray, shape (n_voxels,)
        c' beta.
    variance : ndarray, shape (n_voxels,)
        Estimated var(c' beta).
    t : ndarray, shape (n_voxels,)
        effect / sqrt(variance).
    dof : ndarray, shape (n_voxels,)
        n_subjects_present - rank(X).
    between_variance : ndarray, shape (n_voxels,)
        Between-subject variance (tau^2) of the mixed models; zeros for OLS.
    """

    effect: FloatArray
    variance: FloatArray
    t: FloatArray
    dof: FloatArray
    between_variance: FloatArray


# ---------------------------------------------------------------------------
# design
# ---------------------------------------------------------------------------

def is_numeric_column(values: pd.Series) -> bool:
    """True when a participants column is numeric (not boolean, not text)."""
    return bool(pd.api.types.is_numeric_dtype(values) and not pd.api.types.is_bool_dtype(values))


def code_indicators(values: Sequence[object], column: str, centre: bool = True,
                    drop_first: bool = True) -> tuple[FloatArray, list[str], list[str]]:
    """Indicator columns of a categorical variable.

    Parameters
    ----------
    values : sequence, length n_subjects
        The column's values (compared as text).
    column : str
        Column name, used in the indicator names ``<column>[<level>]``.
    centre : bool
        Subtract each indicator's mean.
    drop_first : bool
        Omit the first level (sorted as text), the reference.

    Returns
    -------
    matrix : ndarray, shape (n_subjects, n_levels - drop_first), float64
    names : list of str
    levels : list of str
        All levels, sorted; ``levels[0]`` is the reference.

    Notes
    -----
    Treatment coding: beta of ``<column>[l]`` is mean(level l) - mean(reference)
    with the other columns held fixed. Centring the indicators changes only
    the meaning of the intercept, which becomes the sample-weighted average
    (Cohen et al. 2003, Applied Multiple Regression, ch. 8).
    """
    text = np.array([str(v) for v in values], dtype=object)
    levels = sorted(set(text.tolist()))
    used = levels[1:] if drop_first else levels
    matrix = np.column_stack([(text == lev).astype(np.float64) for lev in used]) if used else np.zeros((len(text), 0))
    if centre and matrix.shape[1]:
        matrix = matrix - matrix.mean(axis=0)
    return matrix, [f"{column}[{lev}]" for lev in used], levels


def _covariate_columns(table: pd.DataFrame, column: str, categorical: bool,
                       source: str) -> tuple[FloatArray, list[str]]:
    values = table[column]
    if categorical or not is_numeric_column(values):
        matrix, names, levels = code_indicators(values.tolist(), column)
        return matrix, names
    x = values.to_numpy(dtype=np.float64)
    if np.ptp(x) == 0:
        raise GroupError(f"{source}: covariate column {column!r} is constant ({x[0]:g}) over the {len(x)} kept "
                         "subjects; remove it from covariates")
    return (x - x.mean())[:, None], [column]


def build_group_design(table: pd.DataFrame, design: DesignKind, group_column: str | None = None,
                       pair_column: str | None = None, covariates: Sequence[str] = (),
                       site_column: str | None = "site", site_as_covariate: bool = True,
                       source: str = "participants.tsv") -> GroupDesign:
    """Build the group design matrix from the kept subjects' participants rows.

    Parameters
    ----------
    table : DataFrame, n_subjects rows
        Participants rows of the kept subjects, in the order of ``Y``; no
        missing values in the columns used.
    design : {'one_sample', 'two_sample', 'paired', 'regression'}
    group_column : str, optional
        Categorical column defining groups (two_sample, paired).
    pair_column : str, optional
        Column of pair labels (paired).
    covariates : sequence of str
        Extra columns (numeric: centred; text: centred indicators).
    site_column : str or None
        Column of acquisition sites.
    site_as_covariate : bool
        Add centred site indicators (``<site_column>[<level>]``) to the design.
    source : str
        File name used in error messages.

    Returns
    -------
    GroupDesign

    Notes
    -----
    The summary-statistics group GLM of Holmes & Friston (1998, NeuroImage 7:S754).
    Coding of each design kind: see the module docstring.
    """
    n = len(table)
    if design not in DESIGNS:
        raise GroupError(f"group model: design {design!r} is unknown; use one of {list(DESIGNS)}")
    columns: list[FloatArray] = []
    names: list[str] = []
    roles: list[str] = []
    blocks = np.arange(n, dtype=np.int64)

    def add(matrix: FloatArray, new_names: list[str], role: str) -> None:
        for j, name in enumerate(new_names):
            columns.append(matrix[:, j])
            names.append(name)
            roles.append(role)

    if design in ("one_sample", "regression"):
        add(np.ones((n, 1)), ["mean"], "model")
    elif design == "two_sample":
        if not group_column:
            raise GroupError("group model: design two_sample needs group_column; set it to a participants column")
        matrix, new, levels = code_indicators(table[group_column].tolist(), group_column, centre=False,
                                              drop_first=False)
        if len(levels) < 2:
            raise GroupError(f"{source}: column {group_column!r} has one level ({levels[0]!r}) among the kept "
                             "subjects; a two_sample design needs two or more")
        add(matrix, new, "model")
    else:  # paired
        if not group_column or not pair_column:
            raise GroupError("group model: design paired needs group_column and pair_column; set both")
        groups = table[group_column].astype(str).to_numpy()
        pairs = table[pair_column].astype(str).to_numpy()
        levels = sorted(set(groups.tolist()))
        if len(levels) != 2:
            raise GroupError(f"{source}: column {group_column!r} has levels {levels} among the kept subjects; a "
                             "paired design needs exactly two")
        pair_levels = sorted(set(pairs.tolist()))
        for pair in pair_levels:
            members = groups[pairs == pair]
            if len(members) != 2 or set(members.tolist()) != set(levels):
                raise GroupError(f"{source}: pair {pair!r} in column {pair_column!r} has {len(members)} kept "
                                 f"subject(s) with {group_column} {sorted(members.tolist())}; each pair needs one "
                                 f"subject of each level {levels} (drop incomplete pairs)")
        add((groups == levels[1]).astype(np.float64)[:, None], [f"{group_column}[{levels[1]}]"], "model")
        pair_matrix, pair_names, _ = code_indicators(pairs.tolist(), pair_column, centre=False, drop_first=False)
        add(pair_matrix, pair_names, "pair")
        blocks = np.searchsorted(np.array(pair_levels, dtype=object), pairs).astype(np.int64)

    extra = [c for c in covariates if c != site_column or not site_as_covariate]
    for column in extra:
        if column in (group_column, pair_column):
            raise GroupError(f"group model: covariate {column!r} is also the group or pair column; remove it")
        matrix, new = _covariate_columns(table, column, categorical=False, source=source)
        add(matrix, new, "covariate")
    if site_as_covariate and site_column and site_column in table.columns:
        matrix, new = _covariate_columns(table, site_column, categorical=True, source=source)
        add(matrix, new, "site")

    X = np.column_stack(columns) if columns else np.zeros((n, 0))
    X, names, roles = _check_rank(X, names, roles, design, source)
    return GroupDesign(matrix=X, names=names, roles=roles, blocks=blocks)


def _check_rank(X: FloatArray, names: list[str], roles: list[str], design: str,
                source: str) -> tuple[FloatArray, list[str], list[str]]:
    """Reject a rank-deficient design; in paired designs drop site columns absorbed by the pairs."""
    keep: list[int] = []
    for j in range(X.shape[1]):
        trial = keep + [j]
        if np.linalg.matrix_rank(X[:, trial]) == len(trial):
            keep.append(j)
            continue
        if design == "paired" and roles[j] in ("site", "covariate") and names[j].endswith("]"):
            warnings.warn(f"group model: column {names[j]!r} is constant within pairs and absorbed by the pair "
                          "columns; it is dropped from the paired design", GlmstepsWarning, stacklevel=3)
            continue
        raise GroupError(f"{source}: group design column {names[j]!r} is a linear combination of "
                         f"{[names[k] for k in keep]} among the kept subjects (e.g. site confounded with group); "
                         "remove that covariate or set site_as_covariate: false")
    if X.shape[0] <= len(keep):
        raise GroupError(f"{source}: {X.shape[0]} kept subjects for {len(keep)} group design columns; "
                         "the model needs more subjects than columns")
    return X[:, keep], [names[k] for k in keep], [roles[k] for k in keep]


def contrast_vector(weights: Mapping[str, float], names: Sequence[str], contrast_name: str) -> FloatArray:
    """A group contrast ``{column: weight}`` as a vector over the design columns.

    Parameters
    ----------
    weights : mapping of str to float
        Weight per design column name (see the module docstring for names).
    names : sequence of str
        Design column names.
    contrast_name : str
        Name used in error messages.

    Returns
    -------
    c : ndarray, shape (n_regressors,), float64
    """
    if not weights:
        raise GroupError(f"group contrast {contrast_name!r}: no weights; give {{column: weight}} over {list(names)}")
    c = np.zeros(len(names))
    for column, weight in weights.items():
        if column not in names:
            raise GroupError(f"group contrast {contrast_name!r}: column {column!r} is not in the group design "
                             f"{list(names)}; use one of these names")
        try:
            c[list(names).index(column)] = float(weight)
        except (TypeError, ValueError) as exc:
            raise GroupError(f"group contrast {contrast_name!r}: weight of {column!r} is {weight!r}, not a number"
                             ) from exc
    if not np.any(c):
        raise GroupError(f"group contrast {contrast_name!r}: all weights are zero; give a non-zero weight")
    return c


def is_estimable(X: FloatArray, c: FloatArray, rtol: float = 1e-8) -> bool:
    """True when c' beta is estimable: ``c`` lies in the row space of ``X``.

    Notes
    -----
    c is estimable iff c' pinv(X) X = c' (Searle 1971, Linear Models, sec. 5.4).
    """
    if X.shape[0] == 0:
        return False
    projected = np.linalg.pinv(X) @ (X @ c)
    return bool(np.linalg.norm(projected - c) <= rtol * max(1.0, np.linalg.norm(c)))


# ---------------------------------------------------------------------------
# estimation
# ---------------------------------------------------------------------------

def fit_ols_contrast(X: FloatArray, Y: FloatArray, c: FloatArray) -> ContrastFit:
    """Ordinary least squares on subjects' effects (summary statistics approach).

    Parameters
    ----------
    X : ndarray, shape (n_subjects, n_regressors)
    Y : ndarray, shape (n_subjects, n_voxels)
    c : ndarray, shape (n_regressors,)

    Returns
    -------
    ContrastFit

    Notes
    -----
    beta = pinv(X) Y, sigma^2 = ||Y - X beta||^2 / (n - rank X),
    var(c'beta) = sigma^2 c' pinv(X) pinv(X)' c (Holmes & Friston 1998).
    """
    X = np.asarray(X, dtype=np.float64)
    Y = np.asarray(Y, dtype=np.float64)
    A = np.linalg.pinv(X)
    beta = A @ Y
    resid = Y - X @ beta
    rank = np.linalg.matrix_rank(X)
    dof = float(X.shape[0] - rank)
    sigma2 = np.einsum("nv,nv->v", resid, resid) / dof
    a = A.T @ c
    variance = sigma2 * float(a @ a)
    effect = c @ beta
    with np.errstate(divide="ignore", invalid="ignore"):
        t = np.where(variance > 0, effect / np.sqrt(variance), np.nan)
    n_vox = Y.shape[1]
    return ContrastFit(effect=effect, variance=variance, t=t, dof=np.full(n_vox, dof),
                       between_variance=np.zeros(n_vox))


def _weighted_qr(X: FloatArray, W: FloatArray) -> tuple[np.ndarray, np.ndarray]:
    """QR of sqrt(W) X per voxel: Q (v, n, p), R (v, p, p)."""
    Xs = np.sqrt(W).T[:, :, None] * X[None, :, :]
    return np.linalg.qr(Xs, mode="reduced")


def _weighted_pieces(X: FloatArray, Y: FloatArray, W: FloatArray) -> dict[str, np.ndarray]:
    """Weighted least squares per voxel and the traces the variance estimators need.

    Returns residuals r = y - X b_w (n, v), b_w (p, v), R (v, p, p), tr(P) and tr(P P) (v,),
    with P = W - W X (X'WX)^- X' W (Harville 1977).
    """
    Q, R = _weighted_qr(X, W)
    sw = np.sqrt(W)
    qty = np.einsum("vnp,nv->vp", Q, sw * Y)
    beta = np.linalg.solve(R, qty[:, :, None])[:, :, 0].T          # (p, v)
    resid = Y - X @ beta
    h = np.einsum("vnp,vnp->nv", Q, Q)                              # leverages of sqrt(W) X
    qwq = np.einsum("vnp,nv,vnq->vpq", Q, W, Q)
    trace_p = W.sum(axis=0) - np.einsum("nv,nv->v", h, W)
    trace_pp = (np.einsum("nv,nv->v", W, W) - 2.0 * np.einsum("nv,nv->v", h, W * W)
                + np.einsum("vpq,vpq->v", qwq, qwq))
    return {"resid": resid, "beta": beta, "R": R, "trace_p": trace_p, "trace_pp": trace_pp}


def estimate_between_variance_dl(X: FloatArray, Y: FloatArray, V: FloatArray) -> FloatArray:
    """Between-subject variance by the DerSimonian-Laird method of moments.

    Parameters
    ----------
    X : ndarray, shape (n_subjects, n_regressors)
    Y : ndarray, shape (n_subjects, n_voxels)
    V : ndarray, shape (n_subjects, n_voxels)
        First-level variances, > 0.

    Returns
    -------
    tau2 : ndarray, shape (n_voxels,)

    Notes
    -----
    With w = 1/V and the weighted fit residuals r, Q = sum w r^2 and
    tau^2 = max(0, (Q - (n - p)) / (sum w - tr((X'WX)^-1 X'W^2 X)))
    (DerSimonian & Laird 1986, Control Clin Trials 7:177, eq. 8; the
    meta-regression form of Raudenbush 2009). For X = 1 the denominator is
    sum w - sum w^2 / sum w.
    """
    W = 1.0 / np.asarray(V, dtype=np.float64)
    pieces = _weighted_pieces(X, Y, W)
    q = np.einsum("nv,nv->v", W * pieces["resid"], pieces["resid"])
    dof = X.shape[0] - X.shape[1]
    with np.errstate(divide="ignore", invalid="ignore"):
        tau2 = (q - dof) / pieces["trace_p"]
    return np.where(np.isfinite(tau2), np.maximum(tau2, 0.0), 0.0)


def estimate_between_variance_reml(X: FloatArray, Y: FloatArray, V: FloatArray, max_iter: int = 100,
                                   tol: float = 1e-10) -> tuple[FloatArray, npt.NDArray[np.bool_]]:
    """Between-subject variance by restricted maximum likelihood (Fisher scoring).

    Parameters
    ----------
    X : ndarray, shape (n_subjects, n_regressors)
    Y : ndarray, shape (n_subjects, n_voxels)
    V : ndarray, shape (n_subjects, n_voxels)
        First-level variances, >= 0.
    max_iter : int
        Iteration limit.
    tol : float
        Convergence when |step| <= tol * (1 + tau^2).

    Returns
    -------
    tau2 : ndarray, shape (n_voxels,)
    converged : ndarray of bool, shape (n_voxels,)

    Notes
    -----
    The restricted log-likelihood of y ~ N(X b, diag(V + tau^2)) has score
    (y'P P y - tr P) / 2 and expected information tr(P P) / 2, with
    P = W - W X (X'WX)^-1 X'W, W = diag(1 / (V + tau^2)) (Harville 1977,
    JASA 72:320; Viechtbauer 2005, J Educ Behav Stat 30:261, eq. 13). The
    Fisher scoring step is tau^2 += (y'PPy - tr P) / tr(PP), truncated at 0.
    P y = W r with r the weighted fit residuals, so no n x n matrix is formed.
    Starting value: the OLS residual variance minus the mean of V (floored at 0),
    which is the exact REML solution when V is zero.
    """
    X = np.asarray(X, dtype=np.float64)
    Y = np.asarray(Y, dtype=np.float64)
    V = np.asarray(V, dtype=np.float64)
    n, p = X.shape
    resid_ols = Y - X @ (np.linalg.pinv(X) @ Y)
    s2 = np.einsum("nv,nv->v", resid_ols, resid_ols) / (n - p)
    tau2 = np.maximum(s2 - V.mean(axis=0), 0.0)
    # Floor on V + tau^2 so that V = 0 and tau^2 = 0 never divide by zero.
    floor = 1e-12 * np.maximum(s2, np.finfo(np.float64).tiny)
    active = np.arange(Y.shape[1])
    converged = np.zeros(Y.shape[1], dtype=bool)
    for _ in range(max_iter):
        if active.size == 0:
            break
        W = 1.0 / np.maximum(V[:, active] + tau2[active], floor[active])
        pieces = _weighted_pieces(X, Y[:, active], W)
        py = W * pieces["resid"]
        score2 = np.einsum("nv,nv->v", py, py) - pieces["trace_p"]
        with np.errstate(divide="ignore", invalid="ignore"):
            step = np.where(pieces["trace_pp"] > 0, score2 / pieces["trace_pp"], 0.0)
        new = np.maximum(tau2[active] + step, 0.0)
        done = np.abs(new - tau2[active]) <= tol * (1.0 + new)
        tau2[active] = new
        converged[active[done]] = True
        active = active[~done]
    return tau2, converged


def fit_mixed_contrast(X: FloatArray, Y: FloatArray, V: FloatArray, c: FloatArray,
                       method: Literal["mixed_reml", "mixed_dl"]) -> ContrastFit:
    """Mixed-effects group contrast: weights 1 / (first-level variance + tau^2).

    Parameters
    ----------
    X : ndarray, shape (n_subjects, n_regressors)
    Y : ndarray, shape (n_subjects, n_voxels)
        Subjects' effects.
    V : ndarray, shape (n_subjects, n_voxels)
        Subjects' first-level variances of those effects.
    c : ndarray, shape (n_regressors,)
    method : {'mixed_reml', 'mixed_dl'}
        Estimator of tau^2.

    Returns
    -------
    ContrastFit
        ``between_variance`` holds tau^2; dof = n - rank(X).

    Notes
    -----
    b = (X'WX)^-1 X'W y by QR of W^(1/2) X = QR, var(c'b) = ||R^-T c||^2,
    t = c'b / sqrt(var) referred to t with n - p dof (Hartung & Knapp 2001 use
    the same reference distribution; the dof follow DerSimonian & Laird 1986).
    """
    X = np.asarray(X, dtype=np.float64)
    if method == "mixed_reml":
        tau2, converged = estimate_between_variance_reml(X, Y, V)
        if not converged.all():
            warnings.warn(f"group model: REML of the between-subject variance did not converge at "
                          f"{int(np.sum(~converged))} of {converged.size} voxels; their last iterate is used",
                          GlmstepsWarning, stacklevel=2)
    elif method == "mixed_dl":
        tau2 = estimate_between_variance_dl(X, Y, V)
    else:
        raise GroupError(f"group model: estimation {method!r} is unknown; use one of {list(ESTIMATIONS)}")
    resid_scale = np.maximum(np.var(Y, axis=0), np.finfo(np.float64).tiny)
    W = 1.0 / np.maximum(V + tau2, 1e-12 * resid_scale)
    Q, R = _weighted_qr(X, W)
    qty = np.einsum("vnp,nv->vp", Q, np.sqrt(W) * Y)
    beta = np.linalg.solve(R, qty[:, :, None])[:, :, 0].T
    z = np.linalg.solve(np.transpose(R, (0, 2, 1)), np.broadcast_to(c, (R.shape[0], c.size))[:, :, None])[:, :, 0]
    variance = np.einsum("vp,vp->v", z, z)
    effect = c @ beta
    with np.errstate(divide="ignore", invalid="ignore"):
        t = np.where(variance > 0, effect / np.sqrt(variance), np.nan)
    dof = float(X.shape[0] - np.linalg.matrix_rank(X))
    return ContrastFit(effect=effect, variance=variance, t=t, dof=np.full(Y.shape[1], dof), between_variance=tau2)


def fit_contrast(X: FloatArray, Y: FloatArray, V: FloatArray | None, c: FloatArray,
                 estimation: Estimation) -> ContrastFit:
    """Dispatch to :func:`fit_ols_contrast` or :func:`fit_mixed_contrast` (complete data)."""
    if estimation == "ols":
        return fit_ols_contrast(X, Y, c)
    if V is None:
        raise GroupError(f"group model: estimation {estimation!r} needs the first-level variance maps")
    return fit_mixed_contrast(X, Y, V, c, estimation)  # type: ignore[arg-type]


def fit_contrast_with_missing(X: FloatArray, Y: FloatArray, V: FloatArray | None, c: FloatArray,
                              estimation: Estimation) -> tuple[ContrastFit, int]:
    """Fit a group contrast where some subjects lack some voxels (NaN in ``Y`` or ``V``).

    Parameters
    ----------
    X : ndarray, shape (n_subjects, n_regressors)
    Y : ndarray, shape (n_subjects, n_voxels)
        NaN where a subject has no value.
    V : ndarray, shape (n_subjects, n_voxels) or None
        First-level variances (NaN or <= 0 counts as missing for the mixed models).
    c : ndarray, shape (n_regressors,)
    estimation : {'ols', 'mixed_reml', 'mixed_dl'}

    Returns
    -------
    fit : ContrastFit
        NaN at voxels whose present subjects cannot estimate ``c``.
    n_not_estimable : int
        Number of such voxels.

    Notes
    -----
    Voxels are grouped by their pattern of present subjects; each pattern is
    fitted with the absent subjects' rows removed (complete-case analysis per
    voxel, Little & Rubin 2002, sec. 3.2).
    """
    present = np.isfinite(Y)
    if V is not None and estimation != "ols":
        present &= np.isfinite(V) & (V > 0 if estimation == "mixed_dl" else V >= 0)
    n_vox = Y.shape[1]
    out = {k: np.full(n_vox, np.nan) for k in ("effect", "variance", "t", "dof", "between_variance")}
    patterns, inverse = np.unique(present.T, axis=0, return_inverse=True)
    inverse = np.asarray(inverse).reshape(-1)
    bad = 0
    for k, pattern in enumerate(patterns):
        cols = np.flatnonzero(inverse == k)
        Xk = X[pattern]
        if Xk.shape[0] <= np.linalg.matrix_rank(Xk) or not is_estimable(Xk, c) \
                or np.linalg.matrix_rank(Xk) < X.shape[1] and estimation != "ols":
            bad += cols.size
            continue
        fit = fit_contrast(Xk, Y[np.ix_(pattern, cols)], None if V is None else V[np.ix_(pattern, cols)], c,
                           estimation)
        for key in out:
            out[key][cols] = getattr(fit, key)
    return ContrastFit(**out), bad


# ---------------------------------------------------------------------------
# per-site quality control
# ---------------------------------------------------------------------------

def summarise_sites(Y: FloatArray, sites: Sequence[object]) -> tuple[pd.DataFrame, FloatArray]:
    """Per-site summary of subjects' effects within the group mask.

    Parameters
    ----------
    Y : ndarray, shape (n_subjects, n_voxels)
        Effects at the group-mask voxels (NaN where a subject has no value).
    sites : sequence, length n_subjects
        Site of each subject.

    Returns
    -------
    table : DataFrame
        One row per site: ``site``, ``n_subjects``, ``mean_effect`` (mean of the
        subjects' mean effects), ``sd_between_subjects`` (SD, ddof = 1, of the
        subjects' mean effects; NaN for one subject) and
        ``mean_sd_within_subject`` (average over subjects of the spatial SD of
        the effect within the mask).
    subject_means : ndarray, shape (n_subjects,)
        Each subject's mean effect within the mask.
    """
    labels = np.array([str(s) for s in sites], dtype=object)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        subject_means = np.nanmean(Y, axis=1) if Y.shape[1] else np.full(Y.shape[0], np.nan)
        subject_sds = np.nanstd(Y, axis=1, ddof=1) if Y.shape[1] > 1 else np.full(Y.shape[0], np.nan)
    rows = []
    for site in sorted(set(labels.tolist())):
        pick = labels == site
        means = subject_means[pick]
        rows.append({"site": site, "n_subjects": int(pick.sum()), "mean_effect": float(np.mean(means)),
                     "sd_between_subjects": float(np.std(means, ddof=1)) if pick.sum() > 1 else float("nan"),
                     "mean_sd_within_subject": float(np.mean(subject_sds[pick]))})
    return pd.DataFrame(rows), subject_means

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

Mixed effects
-------------
:func:`weighted_fit` is the weighted least squares of every voxel (QR of
W^(1/2) X); :func:`estimate_between_variance_reml` (global REML maximum) and
:func:`estimate_between_variance_dl` estimate tau^2; :func:`fit_mixed_contrast`
weights subjects by 1/(V + tau^2) with the Hartung-Knapp variance.
"""

from __future__ import annotations

import warnings
from collections.abc import Iterator, Mapping, Sequence
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
    converged : ndarray of bool, shape (n_voxels,)
        False where the REML iteration did not converge; True for OLS and
        DerSimonian-Laird (closed forms).
    """

    effect: FloatArray
    variance: FloatArray
    t: FloatArray
    dof: FloatArray
    between_variance: FloatArray
    converged: npt.NDArray[np.bool_]


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
                       between_variance=np.zeros(n_vox), converged=np.ones(n_vox, dtype=bool))


@dataclass(frozen=True)
class WeightedFit:
    """Weighted least squares of every voxel, by QR of W^(1/2) X.

    Attributes
    ----------
    Q : ndarray, shape (n_regressors, n_subjects, n_voxels)
        Orthonormal columns of W^(1/2) X at each voxel.
    R : ndarray, shape (n_regressors, n_regressors, n_voxels)
        Upper-triangular factor: W^(1/2) X = Q R.
    beta : ndarray, shape (n_regressors, n_voxels)
        (X'WX)^-1 X'W y.
    white_resid : ndarray, shape (n_subjects, n_voxels)
        W^(1/2) (y - X beta).
    weights : ndarray, shape (n_subjects, n_voxels)
        W.
    """

    Q: FloatArray
    R: FloatArray
    beta: FloatArray
    white_resid: FloatArray
    weights: FloatArray

    @property
    def ypy(self) -> FloatArray:
        """y'Py = sum_i w_i r_i^2, shape (n_voxels,)."""
        return np.einsum("nv,nv->v", self.white_resid, self.white_resid)

    @property
    def logdet(self) -> FloatArray:
        """log|X'WX| = 2 sum_j log|R_jj|, shape (n_voxels,)."""
        diag = np.abs(np.stack([self.R[j, j] for j in range(self.R.shape[0])]))
        with np.errstate(divide="ignore"):
            return 2.0 * np.log(diag).sum(axis=0)

    def traces(self) -> tuple[FloatArray, FloatArray]:
        """tr(P) and tr(PP) with P = W - W X (X'WX)^-1 X'W, shape (n_voxels,) each.

        Notes
        -----
        With H = Q Q' (the hat matrix of W^(1/2) X), P = W^(1/2) (I - H) W^(1/2), so
        tr P = sum w - sum h w and tr PP = sum w^2 - 2 sum h w^2 + ||Q'WQ||_F^2,
        h the leverages.
        """
        W = self.weights
        h = np.einsum("pnv,pnv->nv", self.Q, self.Q)
        qwq = np.einsum("pnv,qnv->pqv", self.Q * W[None], self.Q)
        trace_p = W.sum(axis=0) - np.einsum("nv,nv->v", h, W)
        trace_pp = (np.einsum("nv,nv->v", W, W) - 2.0 * np.einsum("nv,nv->v", h, W * W)
                    + np.einsum("pqv,pqv->v", qwq, qwq))
        return trace_p, trace_pp

    def contrast_variance(self, c: FloatArray) -> FloatArray:
        """c'(X'WX)^-1 c = ||R^-T c||^2 at every voxel, shape (n_voxels,)."""
        p = self.R.shape[0]
        z = np.zeros((p, self.R.shape[2]))
        for j in range(p):                    # forward substitution R' z = c
            z[j] = (c[j] - np.einsum("kv,kv->v", self.R[:j, j], z[:j])) / self.R[j, j]
        return np.einsum("pv,pv->v", z, z)


def weighted_fit(X: FloatArray, Y: FloatArray, W: FloatArray) -> WeightedFit:
    """Weighted least squares per voxel by QR of W^(1/2) X (Gram-Schmidt, reorthogonalised).

    Parameters
    ----------
    X : ndarray, shape (n_subjects, n_regressors)
        Full column rank.
    Y, W : ndarray, shape (n_subjects, n_voxels)
        Data and weights (> 0).

    Returns
    -------
    WeightedFit

    Notes
    -----
    Columns are orthogonalised one after another with two passes of
    Gram-Schmidt each ("twice is enough": Giraud, Langou & Rozloznik 2005,
    Comput Math Appl 50:1069), which keeps Q orthonormal to working precision
    for a full-rank X, vectorised over voxels (the group design is small and
    shared, the weights differ by voxel). beta solves R beta = Q' W^(1/2) y by
    back substitution; the normal equations are never formed.
    """
    X = np.asarray(X, dtype=np.float64)
    Y = np.asarray(Y, dtype=np.float64)
    W = np.asarray(W, dtype=np.float64)
    n, p = X.shape
    sw = np.sqrt(W)
    Q = np.empty((p, n, Y.shape[1]))
    R = np.zeros((p, p, Y.shape[1]))
    for j in range(p):
        a = sw * X[:, j:j + 1]
        for _ in range(2 if j else 1):
            if j:
                coef = np.einsum("knv,nv->kv", Q[:j], a)
                a = a - np.einsum("knv,kv->nv", Q[:j], coef)
                R[:j, j] += coef
        norm = np.sqrt(np.einsum("nv,nv->v", a, a))
        R[j, j] = norm
        with np.errstate(divide="ignore", invalid="ignore"):
            Q[j] = a / norm
    swy = sw * Y
    qty = np.einsum("pnv,nv->pv", Q, swy)
    beta = np.zeros((p, Y.shape[1]))
    for j in range(p - 1, -1, -1):            # back substitution R beta = Q'W^(1/2) y
        beta[j] = (qty[j] - np.einsum("kv,kv->v", R[j, j + 1:], beta[j + 1:])) / R[j, j]
    white_resid = swy - np.einsum("pnv,pv->nv", Q, qty)
    return WeightedFit(Q=Q, R=R, beta=beta, white_resid=white_resid, weights=W)


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
    fit = weighted_fit(X, Y, W)
    trace_p, _ = fit.traces()
    dof = X.shape[0] - X.shape[1]
    with np.errstate(divide="ignore", invalid="ignore"):
        tau2 = (fit.ypy - dof) / trace_p
    return np.where(np.isfinite(tau2), np.maximum(tau2, 0.0), 0.0)


@dataclass(frozen=True)
class RemlResult:
    """Output of :func:`estimate_between_variance_reml`.

    Attributes
    ----------
    tau2 : ndarray, shape (n_voxels,)
        REML between-subject variance (>= 0).
    converged : ndarray of bool, shape (n_voxels,)
        The relative step fell below the tolerance (or the maximum is on the
        boundary tau^2 = 0) within the iteration limit.
    n_iterations : ndarray of int, shape (n_voxels,)
    """

    tau2: FloatArray
    converged: npt.NDArray[np.bool_]
    n_iterations: npt.NDArray[np.int64]

    def __iter__(self):  # ``tau2, converged = estimate_between_variance_reml(...)`` keeps working
        return iter((self.tau2, self.converged))


@dataclass(frozen=True)
class RemlResult:
    """Output of :func:`estimate_between_variance_reml`.

    Attributes
    ----------
    tau2 : ndarray, shape (n_voxels,)
        REML between-subject variance (>= 0).
    converged : ndarray of bool, shape (n_voxels,)
        The bracket of the root of the score (or the last Newton step) shrank
        below the tolerance, or the maximum is on the boundary tau^2 = 0.
    n_iterations : ndarray of int, shape (n_voxels,)
    """

    tau2: FloatArray
    converged: npt.NDArray[np.bool_]
    n_iterations: npt.NDArray[np.int64]

    def __iter__(self) -> Iterator[np.ndarray]:
        """``tau2, converged = estimate_between_variance_reml(...)``."""
        return iter((self.tau2, self.converged))


def _reml_terms(X: FloatArray, Y: FloatArray, V: FloatArray, tau2: FloatArray, floor: FloatArray
                ) -> tuple[FloatArray, FloatArray, FloatArray]:
    """Twice the REML score, twice its derivative and the restricted log-likelihood, per voxel.

    Notes
    -----
    2 dl_R/dtau^2 = y'PPy - tr P and 2 d^2 l_R/d(tau^2)^2 = tr(PP) - 2 y'PPPy
    (Harville 1977; Viechtbauer 2005, eq. 13 and its derivative);
    l_R = -1/2 [sum log(v + tau^2) + log|X'WX| + y'Py]. With u = P y = W r:
    u'P u = ||W^(1/2) u||^2 - ||Q' W^(1/2) u||^2.
    """
    total = np.maximum(V + tau2, floor)
    fit = weighted_fit(X, Y, 1.0 / total)
    trace_p, trace_pp = fit.traces()
    sw = np.sqrt(fit.weights)
    u = sw * fit.white_resid                                           # P y = W r
    su = sw * u
    qsu = np.einsum("pnv,nv->pv", fit.Q, su)
    upu = np.einsum("nv,nv->v", su, su) - np.einsum("pv,pv->v", qsu, qsu)
    loglik = -0.5 * (np.log(total).sum(axis=0) + fit.logdet + fit.ypy)
    return np.einsum("nv,nv->v", u, u) - trace_p, trace_pp - 2.0 * upu, loglik


#: Points of the scan for sign changes of the REML score (log-spaced, see
#: :func:`estimate_between_variance_reml`).
REML_SCAN_POINTS = 32
#: Lowest scanned tau^2, as a fraction of the mean first-level variance.
REML_SCAN_LOW = 1e-4
#: Doublings allowed when looking for a tau^2 where the score is negative.
REML_MAX_DOUBLINGS = 80


def _refine_reml_roots(X: FloatArray, Y: FloatArray, V: FloatArray, lo: FloatArray, hi: FloatArray,
                       floor: FloatArray, scale: FloatArray, max_iter: int, tol: float
                       ) -> tuple[FloatArray, npt.NDArray[np.bool_], npt.NDArray[np.int64]]:
    """Root of the REML score inside brackets with S(lo) > 0 > S(hi), one bracket per column.

    Newton steps with the observed information, replaced by bisection when a
    step leaves the bracket or the likelihood is not concave there; the bracket
    shrinks by the sign of S at every iterate (safeguarded Newton, Press et al.
    2007, Numerical Recipes 3rd ed., sec. 9.4).
    """
    m = lo.size
    root = 0.5 * (lo + hi)
    converged = np.zeros(m, dtype=bool)
    iterations = np.zeros(m, dtype=np.int64)
    active = np.arange(m)
    x, lo, hi = root.copy(), lo.copy(), hi.copy()
    for _ in range(max_iter):
        if active.size == 0:
            break
        iterations[active] += 1
        score, slope, _ = _reml_terms(X, Y[:, active], V[:, active], x, floor[active])
        up = score > 0
        lo = np.where(up, x, lo)
        hi = np.where(up, hi, x)
        with np.errstate(divide="ignore", invalid="ignore"):
            newton = x - score / slope
        ok = (slope < 0) & (newton > lo) & (newton < hi)
        new = np.where(ok, newton, 0.5 * (lo + hi))
        size = tol * (np.abs(new) + scale[active])
        done = (np.abs(new - x) <= size) | (hi - lo <= size) | (score == 0)
        root[active] = new
        converged[active[done]] = True
        keep = ~done
        active, x, lo, hi = active[keep], new[keep], lo[keep], hi[keep]
    return root, converged, iterations


def estimate_between_variance_reml(X: FloatArray, Y: FloatArray, V: FloatArray, max_iter: int = 100,
                                   tol: float = 1e-10) -> RemlResult:
    """Between-subject variance by restricted maximum likelihood (global over tau^2 >= 0).

    Parameters
    ----------
    X : ndarray, shape (n_subjects, n_regressors)
    Y : ndarray, shape (n_subjects, n_voxels)
    V : ndarray, shape (n_subjects, n_voxels)
        First-level variances, >= 0.
    max_iter : int
        Iteration limit of each root search.
    tol : float
        Convergence when the bracket, or the last step, is at most
        ``tol * (tau^2 + mean(V))``: relative to the voxel's own variance
        scale, so the units of the maps do not matter.

    Returns
    -------
    RemlResult
        ``tau2``, ``converged``, ``n_iterations`` (also unpackable as
        ``tau2, converged``).

    Notes
    -----
    The restricted log-likelihood l_R of y ~ N(X b, diag(V + tau^2)) has score
    S = (y'P P y - tr P) / 2 with P = W - W X (X'WX)^-1 X'W,
    W = diag(1 / (V + tau^2)) (Harville 1977, JASA 72:320; Viechtbauer 2005,
    J Educ Behav Stat 30:261, eq. 13). With unequal first-level variances l_R
    can have two local maxima (one at tau^2 = 0, one inside), so the maximum
    is found globally:

    1. an upper end ``hi`` with S(hi) < 0 (from max(2 s^2_OLS, mean V), doubled
       while S >= 0; S < 0 for every large enough tau^2);
    2. S and l_R on 0 and :data:`REML_SCAN_POINTS` log-spaced points from
       :data:`REML_SCAN_LOW` x mean(V) to ``hi``; every change of sign of S from
       + to - brackets a local maximum, and tau^2 = 0 is one when S(0) <= 0;
    3. each bracket is solved by safeguarded Newton (:func:`_refine_reml_roots`),
       which cannot oscillate, unlike plain Fisher scoring;
    4. the candidate with the largest l_R is kept.

    A voxel is reported as not converged when a root search hit ``max_iter``.
    """
    X = np.asarray(X, dtype=np.float64)
    Y = np.asarray(Y, dtype=np.float64)
    V = np.asarray(V, dtype=np.float64)
    n, p = X.shape
    n_vox = Y.shape[1]
    resid_ols = Y - X @ (np.linalg.pinv(X) @ Y)
    s2 = np.einsum("nv,nv->v", resid_ols, resid_ols) / (n - p)
    # Floor on V + tau^2 so that V = 0 and tau^2 = 0 never divide by zero.
    floor = 1e-12 * np.maximum(s2, np.finfo(np.float64).tiny)
    scale = V.mean(axis=0) + floor
    everything = np.arange(n_vox)

    hi = np.maximum(2.0 * s2, scale)
    pending = everything
    for _ in range(REML_MAX_DOUBLINGS):
        s_hi, _, _ = _reml_terms(X, Y[:, pending], V[:, pending], hi[pending], floor[pending])
        pending = pending[s_hi >= 0]
        if pending.size == 0:
            break
        hi[pending] *= 2.0
    # scan: column k holds tau^2 = grid[k] (k = 0 is the boundary)
    low = np.minimum(REML_SCAN_LOW * scale, 0.5 * hi)
    steps = np.linspace(0.0, 1.0, REML_SCAN_POINTS)
    grid = np.vstack([np.zeros(n_vox), np.exp(np.log(low)[None, :] + steps[:, None] * np.log(hi / low)[None, :])])
    score = np.empty(grid.shape)
    loglik = np.empty(grid.shape)
    for k in range(grid.shape[0]):
        score[k], _, loglik[k] = _reml_terms(X, Y, V, grid[k], floor)
    # candidates: (voxel, tau^2, converged, iterations, l_R)
    at_zero = ~(score[0] > 0)
    cand_vox = [everything[at_zero]]
    cand_tau = [np.zeros(int(at_zero.sum()))]
    cand_ok = [np.ones(int(at_zero.sum()), dtype=bool)]
    cand_it = [np.zeros(int(at_zero.sum()), dtype=np.int64)]
    cand_ll = [loglik[0, at_zero]]
    k_idx, v_idx = np.nonzero((score[:-1] > 0) & ~(score[1:] > 0))
    if v_idx.size:
        root, ok, its = _refine_reml_roots(X, Y[:, v_idx], V[:, v_idx], grid[k_idx, v_idx], grid[k_idx + 1, v_idx],
                                           floor[v_idx], scale[v_idx], max_iter, tol)
        _, _, root_ll = _reml_terms(X, Y[:, v_idx], V[:, v_idx], root, floor[v_idx])
        cand_vox.append(v_idx)
        cand_tau.append(root)
        cand_ok.append(ok)
        cand_it.append(its)
        cand_ll.append(root_ll)
    vox = np.concatenate(cand_vox)
    tau = np.concatenate(cand_tau)
    ok_all = np.concatenate(cand_ok)
    it_all = np.concatenate(cand_it)
    ll_all = np.nan_to_num(np.concatenate(cand_ll), nan=-np.inf)
    order = np.lexsort((-ll_all, vox))               # per voxel, the best candidate first
    first = np.ones(order.size, dtype=bool)
    first[1:] = vox[order][1:] != vox[order][:-1]
    best = order[first]
    tau2 = np.zeros(n_vox)
    converged = np.zeros(n_vox, dtype=bool)
    iterations = np.zeros(n_vox, dtype=np.int64)
    tau2[vox[best]] = tau[best]
    converged[vox[best]] = ok_all[best]
    np.add.at(iterations, vox, it_all)
    missing = np.ones(n_vox, dtype=bool)
    missing[vox[best]] = False
    converged[missing] = False                        # no candidate at all (non-finite input)
    return RemlResult(tau2=tau2, converged=converged, n_iterations=iterations)


MixedInference = Literal["hartung_knapp", "robust"]
#: Small-sample inference of the mixed-effects models, as recorded in sidecars.
MIXED_INFERENCE = ("weights 1/(V + tau^2); Hartung-Knapp-Sidik-Jonkman variance q c'(X'WX)^-1 c with "
                   "q = sum w r^2 / (n - p), t referred to Student t on n - p degrees of freedom (Hartung & Knapp "
                   "2001; Sidik & Jonkman 2002; Knapp & Hartung 2003)")


def robust_contrast_variance(fit: WeightedFit, c: FloatArray) -> tuple[FloatArray, FloatArray]:
    """Bias-reduced robust variance of c'b and its Satterthwaite degrees of freedom, per voxel.

    Parameters
    ----------
    fit : WeightedFit
        Weighted fit with the working weights W = 1/(V + tau^2).
    c : ndarray, shape (n_regressors,)

    Returns
    -------
    variance : ndarray, shape (n_voxels,)
        sum_i a_i^2 r_i^2 / (1 - h_ii), with c'b = a'y and h_ii the leverages of
        W^(1/2) X; NaN where a subject with non-zero weight in c'b has leverage 1.
    dof : ndarray, shape (n_voxels,)
        nu = tr(G B)^2 / tr(G B G B), G = diag(a^2 / (1 - h)), B = Omega - K the
        covariance of the residuals under the working model Omega = W^-1,
        K = X (X'WX)^-1 X'.

    Notes
    -----
    The HC2 / CR2 "bias-reduced linearisation" estimator is unbiased for
    c'(X'WX)^-1 c when the working model is right, and stays consistent when
    it is not (e.g. when tau^2 is under-estimated); its Satterthwaite degrees
    of freedom follow Bell & McCaffrey (2002, Survey Methodology 28:169, eq. 8)
    as recommended for meta-regression by Tipton (2015, Psychol Methods 20:375).
    With equal weights in a one-sample design it is the one-sample t test
    (variance s^2/n, nu = n - 1). With W^(1/2) X = QR: a = W^(1/2) Q R^-T c,
    h = diag(QQ'), tr(GB) = sum a^2 / w and
    tr(GBGB) = sum g^2 o^2 (1 - 2h) + ||Q' diag(g o) Q||_F^2 with o = 1/w.
    """
    p = fit.R.shape[0]
    z = np.zeros((p, fit.R.shape[2]))
    for j in range(p):                          # forward substitution R' z = c
        z[j] = (c[j] - np.einsum("kv,kv->v", fit.R[:j, j], z[:j])) / fit.R[j, j]
    sw = np.sqrt(fit.weights)
    a = sw * np.einsum("pnv,pv->nv", fit.Q, z)
    h = np.einsum("pnv,pnv->nv", fit.Q, fit.Q)
    resid = fit.white_resid / sw
    with np.errstate(divide="ignore", invalid="ignore"):
        g = np.where(a != 0, a * a / (1.0 - h), 0.0)
    g = np.where(np.isfinite(g), g, np.nan)
    variance = np.einsum("nv,nv->v", g, resid * resid)
    o = 1.0 / fit.weights
    go = g * o
    qgq = np.einsum("pnv,qnv->pqv", fit.Q * go[None], fit.Q)
    trace_gb = np.einsum("nv,nv->v", a * a, o)
    trace_gbgb = np.einsum("nv,nv->v", go * go, 1.0 - 2.0 * h) + np.einsum("pqv,pqv->v", qgq, qgq)
    with np.errstate(divide="ignore", invalid="ignore"):
        dof = trace_gb**2 / trace_gbgb
    return variance, dof


def fit_mixed_contrast(X: FloatArray, Y: FloatArray, V: FloatArray, c: FloatArray,
                       method: Literal["mixed_reml", "mixed_dl"],
                       inference: MixedInference = "hartung_knapp") -> ContrastFit:
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
    inference : {'hartung_knapp', 'robust'}
        ``hartung_knapp`` (the workflow's): var(c'b) = q c'(X'WX)^-1 c with
        q = sum w r^2 / (n - p), t on n - p dof (Hartung & Knapp 2001, Stat Med
        20:3875; Sidik & Jonkman 2002, Stat Med 21:3153; Knapp & Hartung 2003,
        Stat Med 22:2693). ``robust``: :func:`robust_contrast_variance`, t on
        its Satterthwaite dof; kept for comparison
        (tests/benchmarks/bench_group_calibration.py).

    Returns
    -------
    ContrastFit
        ``between_variance`` holds tau^2, ``variance`` the variance of c'b used
        for t, ``dof`` its degrees of freedom; ``converged`` is False where REML
        did not converge (always True for DerSimonian-Laird).

    Notes
    -----
    b = (X'WX)^-1 X'W y by QR of W^(1/2) X, W = diag(1/(V + tau^2)). Treating
    tau^2 as known (variance c'(X'WX)^-1 c, t on n - p dof) ignores its
    uncertainty; the Hartung-Knapp factor q rescales the variance by the
    observed weighted residual spread (with known weights t is then Student t
    on n - p dof; Hartung & Knapp 2001). With estimated tau^2, the two-sided
    null rate at p < 0.001 is within its binomial interval for 20 subjects
    whose first-level variances differ up to 2x, for tau^2 = 0, 0.5 and 2
    (tests/test_group.py). It is not in general: when first-level variances
    differ more between subjects, or with about 10 subjects, an
    under-estimated tau^2 lets a few subjects dominate the weights and q then
    has fewer effective degrees of freedom than n - p;
    tests/benchmarks/bench_group_calibration.py reports the rates. The
    ``robust`` variance is not liberal there but is very conservative for
    covariate contrasts (small Satterthwaite dof), so it is not the default.
    The ``hartung_knapp`` variance equals statsmodels' WLS with the weights
    1/(V + tau^2) and an estimated scale; ``robust`` equals its HC2 covariance
    (tests/test_group.py).
    """
    X = np.asarray(X, dtype=np.float64)
    c = np.asarray(c, dtype=np.float64)
    converged = np.ones(Y.shape[1], dtype=bool)
    if method == "mixed_reml":
        reml = estimate_between_variance_reml(X, Y, V)
        tau2, converged = reml.tau2, reml.converged
        if not converged.all():
            warnings.warn(f"group model: REML of the between-subject variance did not converge at "
                          f"{int(np.sum(~converged))} of {converged.size} voxels; their last iterate is used "
                          "(listed in the sidecar)", GlmstepsWarning, stacklevel=2)
    elif method == "mixed_dl":
        tau2 = estimate_between_variance_dl(X, Y, V)
    else:
        raise GroupError(f"group model: estimation {method!r} is unknown; use one of {list(ESTIMATIONS)}")
    resid_scale = np.maximum(np.var(Y, axis=0), np.finfo(np.float64).tiny)
    W = 1.0 / np.maximum(V + tau2, 1e-12 * resid_scale)
    fit = weighted_fit(X, Y, W)
    effect = c @ fit.beta
    if inference == "hartung_knapp":
        dof_value = float(X.shape[0] - np.linalg.matrix_rank(X))
        variance = fit.ypy / dof_value * fit.contrast_variance(c)
        dof = np.full(Y.shape[1], dof_value)
    elif inference == "robust":
        variance, dof = robust_contrast_variance(fit, c)
    else:
        raise ValueError(f"inference must be 'robust' or 'hartung_knapp', got {inference!r}")
    with np.errstate(divide="ignore", invalid="ignore"):
        t = np.where(variance > 0, effect / np.sqrt(variance), np.nan)
    dof = np.where(np.isfinite(t), dof, np.nan)
    return ContrastFit(effect=effect, variance=variance, t=t, dof=dof, between_variance=tau2, converged=converged)


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
    out: dict[str, np.ndarray] = {k: np.full(n_vox, np.nan) for k in ("effect", "variance", "t", "dof",
                                                                       "between_variance")}
    out["converged"] = np.ones(n_vox, dtype=bool)
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

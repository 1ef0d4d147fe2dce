"""Contrast specifications to matrices, estimability, and t/F contrast maps.

Pure maths: arrays and mappings in, arrays out; no file access.

Contrast specifications (from the configuration)
------------------------------------------------
t contrast::

    {"weights": {key: weight, ...}, "tail": "two-sided" | "positive" | "negative"}

F contrast::

    {"rows": [{key: weight, ...}, ...]}

A *key* is resolved in this order:

1. a condition name: its main column (basis ``main``); a condition modelled
   with an FIR basis (no main column) spreads the weight equally over its
   ``fir<k>`` bins, each getting ``weight / n_bins`` (so the contrast is the
   mean response over the bins);
2. an exact design column name (``A__latency``, ``A__width``, ``slow_01``,
   ``intercept``, a confound column, ...);
3. in an F contrast row only, ``<condition>__all``: every basis column of
   the condition (main, latency, width, fir bins; not modulators)
   as separate rows. A row holding several ``__all`` keys pairs their basis
   columns in order (they must have the same number); plain keys of that
   row are repeated in each expanded row.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, Literal

import numpy as np
import numpy.typing as npt

from . import stats
from .errors import ContrastError
from .names import ALL_SUFFIX, FIR_PREFIX, LATENCY_BASIS, WIDTH_BASIS
from .renames import renamed_column

Kind = Literal["t", "F"]
#: Basis labels of a condition's response columns (besides the ``fir<k>`` bins); see glmsteps.names.
_BASIS_COLUMNS = ("main", LATENCY_BASIS, WIDTH_BASIS)


@dataclass(frozen=True)
class ContrastSpec:
    """A validated contrast specification.

    Attributes
    ----------
    name : str
        Contrast name.
    kind : {"t", "F"}
        t contrast (one row of weights) or F contrast (several rows).
    rows : list of dict
        Weights per row, ``{key: weight}``.
    tail : {"two-sided", "positive", "negative"}
        Alternative of a t contrast (F contrasts are always upper-tailed).
    """

    name: str
    kind: Kind
    rows: list[dict[str, float]]
    tail: stats.Tail = "two-sided"


def _check_weights(name: str, weights: Any, where: str) -> dict[str, float]:
    """``where``: the config key of the weights, e.g. ``contrasts.faces.weights`` or ``contrasts.any.rows[0]``."""
    if not isinstance(weights, Mapping) or not weights:
        raise ContrastError(f"contrast {name!r}: {where} must be a non-empty mapping of condition or column to weight, "
                            f"found {weights!r}")
    out = {}
    for key, value in weights.items():
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(float(value)):
            raise ContrastError(f"contrast {name!r}: the weight of {key!r} in {where} must be a finite number, found "
                                f"{value!r}; write a number")
        out[str(key)] = float(value)
    if all(v == 0.0 for v in out.values()):
        raise ContrastError(f"contrast {name!r}: {where} has only zero weights; give at least one non-zero weight "
                            "or delete it")
    return out


def parse_spec(name: str, spec: Mapping[str, Any], tail: str | None = None) -> ContrastSpec:
    """Validate a contrast specification from the configuration.

    Parameters
    ----------
    name : str
        Contrast name (for messages).
    spec : mapping
        ``{weights, tail}`` (t) or ``{rows}`` (F).
    tail : str, optional
        Overrides ``spec["tail"]`` when given.

    Returns
    -------
    ContrastSpec

    Raises
    ------
    ContrastError
        Missing or malformed weights, unknown tail, both or neither of
        ``weights`` and ``rows``.
    """
    if not isinstance(spec, Mapping):
        raise ContrastError(f"contrast {name!r}: definition must be a mapping with 'weights' (t) or 'rows' (F), "
                            f"found {type(spec).__name__}")
    has_w, has_r = "weights" in spec, "rows" in spec
    if has_w == has_r:
        raise ContrastError(f"contrast {name!r}: give exactly one of 'weights' (t contrast) or 'rows' (F contrast), "
                            f"found keys {sorted(spec)}")
    unknown = set(spec) - {"weights", "rows", "tail"}
    if unknown:
        raise ContrastError(f"contrast {name!r}: unknown key(s) {sorted(unknown)}; allowed: weights, rows, tail")
    chosen_tail = tail if tail is not None else spec.get("tail", "two-sided")
    if chosen_tail not in stats.TAILS:
        raise ContrastError(f"contrast {name!r}: tail must be one of {list(stats.TAILS)}, found {chosen_tail!r}")
    if has_w:
        return ContrastSpec(name, "t", [_check_weights(name, spec["weights"], f"contrasts.{name}.weights")],
                            chosen_tail)
    rows = spec["rows"]
    if not isinstance(rows, Sequence) or isinstance(rows, str) or not rows:
        raise ContrastError(f"contrast {name!r}: rows must be a non-empty list of weight mappings, found {rows!r}")
    return ContrastSpec(name, "F", [_check_weights(name, r, f"contrasts.{name}.rows[{i}]") for i, r in enumerate(rows)], "two-sided")


def _condition_columns(cond: str, conditions: Sequence[str], basis: Sequence[str]) -> list[int]:
    """Indices of a condition's basis columns (main/latency/width/fir), in design order."""
    return [j for j, (c, b) in enumerate(zip(conditions, basis))
            if c == cond and (b in _BASIS_COLUMNS or str(b).startswith(FIR_PREFIX))]


def _resolve_key(spec: ContrastSpec, key: str, names: Sequence[str], conditions: Sequence[str],
                 basis: Sequence[str]) -> list[tuple[int, float]]:
    """Columns and relative weights of one plain key (condition or exact column)."""
    if key in set(conditions) and key:
        main = [j for j, (c, b) in enumerate(zip(conditions, basis)) if c == key and b == "main"]
        if main:
            return [(main[0], 1.0)]
        fir = [j for j, (c, b) in enumerate(zip(conditions, basis)) if c == key and str(b).startswith(FIR_PREFIX)]
        if fir:
            return [(j, 1.0 / len(fir)) for j in fir]
    if key in names:
        return [(list(names).index(key), 1.0)]
    available_conditions = sorted({c for c in conditions if c})
    new = renamed_column(key)
    if new is not None:
        raise ContrastError(f"contrast {spec.name!r}: key {key!r} is an old design column name; the column is now "
                            f"called {new!r}; use that key in the contrast weights")
    raise ContrastError(f"contrast {spec.name!r}: key {key!r} is neither a condition nor a design column; "
                        f"available conditions: {available_conditions}; columns: {list(names)}")


def contrast_matrix(spec: ContrastSpec | Mapping[str, Any], names: Sequence[str], conditions: Sequence[str],
                    basis: Sequence[str], name: str = "contrast") -> npt.NDArray[np.float64]:
    """Build the contrast matrix of a specification for one design.

    Parameters
    ----------
    spec : ContrastSpec or mapping
        The contrast (a raw mapping is validated with :func:`parse_spec`).
    names, conditions, basis : sequence of str, length p
        Design column names, the condition of each column ('' for nuisance
        columns), and its basis (``main``, ``latency``, ``width``,
        ``fir<k>``, ``modulator`` or '').
    name : str
        Contrast name used when ``spec`` is a raw mapping.

    Returns
    -------
    C : ndarray of float64, shape (q, p)
        One row for a t contrast; q rows for an F contrast.

    Raises
    ------
    ContrastError
        Unknown key (names the contrast, the key, the available conditions
        and columns); ``__all`` in a t contrast; paired ``__all`` keys of
        different sizes.
    """
    if not isinstance(spec, ContrastSpec):
        spec = parse_spec(name, spec)
    p = len(names)
    if not (len(conditions) == len(basis) == p):
        raise ContrastError(f"contrast {spec.name!r}: design metadata lengths differ (names {p}, conditions "
                            f"{len(conditions)}, basis {len(basis)}); rebuild the design")
    out_rows: list[npt.NDArray[np.float64]] = []
    for row in spec.rows:
        plain = np.zeros(p)
        groups: list[tuple[list[int], float]] = []
        for key, weight in row.items():
            if key.endswith(ALL_SUFFIX) and key not in names:
                cond = key[: -len(ALL_SUFFIX)]
                cols = _condition_columns(cond, conditions, basis)
                if spec.kind == "t":
                    raise ContrastError(f"contrast {spec.name!r}: key {key!r} selects several columns; use it in an "
                                        f"F contrast ('rows') or name one column")
                if not cols:
                    raise ContrastError(f"contrast {spec.name!r}: key {key!r} names no condition with basis columns; "
                                        f"available conditions: {sorted({c for c in conditions if c})}")
                groups.append((cols, weight))
                continue
            for j, rel in _resolve_key(spec, key, names, conditions, basis):
                plain[j] += weight * rel
        if not groups:
            out_rows.append(plain)
            continue
        sizes = {len(cols) for cols, _ in groups}
        if len(sizes) != 1:
            raise ContrastError(f"contrast {spec.name!r}: '__all' keys in one row have different numbers of basis "
                                f"columns {sorted(sizes)}; put them in separate rows")
        for k in range(sizes.pop()):
            r = plain.copy()
            for cols, weight in groups:
                r[cols[k]] += weight
            out_rows.append(r)
    C = np.vstack(out_rows)
    if spec.kind == "t" and C.shape[0] != 1:
        raise ContrastError(f"contrast {spec.name!r}: a t contrast must have one row, found {C.shape[0]}")
    return C


@dataclass(frozen=True)
class Estimability:
    """Whether a contrast is estimable on a design, and why not.

    Attributes
    ----------
    estimable : bool
    reason : str
        Empty when estimable; else which column is all zero or how far C is
        from the row space of X.
    zero_columns : list of int
        Columns with a non-zero weight that are all zero in X.
    """

    estimable: bool
    reason: str = ""
    zero_columns: list[int] = field(default_factory=list)


def estimability(X: npt.NDArray[np.floating], C: npt.NDArray[np.floating],
                 names: Sequence[str] | None = None, conditions: Sequence[str] | None = None,
                 rtol: float = 1e-6) -> Estimability:
    """Check that a contrast is estimable on a design.

    Parameters
    ----------
    X : ndarray, shape (n_scans, n_regressors)
        Design matrix.
    C : ndarray, shape (q, n_regressors)
        Contrast matrix.
    names, conditions : sequence of str, optional
        Column names and conditions, for the reason text.
    rtol : float
        Tolerance on ``|C pinv(X) X - C|`` relative to ``max |C|``.

    Returns
    -------
    Estimability

    Notes
    -----
    :math:`C\\beta` is estimable iff every row of C lies in the row space of
    X, i.e. :math:`C X^+ X = C` (Searle 1971, *Linear Models*, sec. 5.4). A
    non-zero weight on an all-zero column (e.g. a condition without events in
    this run) is reported first, by name.
    """
    X = np.asarray(X, dtype=np.float64)
    C = np.atleast_2d(np.asarray(C, dtype=np.float64))
    weighted = np.any(C != 0, axis=0)
    zero_col = ~np.any(X != 0, axis=0)
    bad = np.flatnonzero(weighted & zero_col)
    if bad.size:
        parts = []
        for j in bad:
            label = names[j] if names is not None else f"#{j}"
            cond = conditions[j] if conditions is not None else ""
            parts.append(f"column {label!r} is all zero" + (f" (condition {cond!r} has no events in this run)"
                                                             if cond else ""))
        return Estimability(False, "; ".join(parts), [int(j) for j in bad])
    projected = C @ np.linalg.pinv(X) @ X
    gap = float(np.max(np.abs(projected - C)))
    scale = float(np.max(np.abs(C)))
    if gap > rtol * scale:
        return Estimability(False, f"contrast is not in the row space of the design "
                                   f"(max |C pinv(X) X - C| = {gap:.3g}); the weighted columns are collinear")
    return Estimability(True)


def efficiency(X: npt.NDArray[np.floating], C: npt.NDArray[np.floating]) -> float:
    """Design efficiency of a contrast.

    Parameters
    ----------
    X : ndarray, shape (n_scans, n_regressors)
    C : ndarray, shape (q, n_regressors)

    Returns
    -------
    float
        :math:`1 / \\operatorname{trace}(C (X'X)^+ C')`; for one row this is
        :math:`1 / (c'(X'X)^+ c)`.

    Notes
    -----
    Dale (1999), Hum. Brain Mapp. 8:109-114; Friston et al. (1999). The
    generalised inverse is formed as :math:`X^+ X^{+\\prime}`, never by
    inverting :math:`X'X`.
    """
    X = np.asarray(X, dtype=np.float64)
    C = np.atleast_2d(np.asarray(C, dtype=np.float64))
    Xp = np.linalg.pinv(X)
    cov = Xp @ Xp.T
    denom = float(np.trace(C @ cov @ C.T))
    return 1.0 / denom if denom > 0 else float("inf")


@dataclass
class TContrastResult:
    """Per-voxel results of a t contrast (arrays of shape (v,), float64)."""

    effect: npt.NDArray[np.float64]
    variance: npt.NDArray[np.float64]
    t: npt.NDArray[np.float64]
    z: npt.NDArray[np.float64]
    p: npt.NDArray[np.float64]
    log_p: npt.NDArray[np.float64]
    dof: npt.NDArray[np.float64]


@dataclass
class FContrastResult:
    """Per-voxel results of an F contrast (arrays of shape (v,), float64)."""

    f: npt.NDArray[np.float64]
    z: npt.NDArray[np.float64]
    p: npt.NDArray[np.float64]
    log_p: npt.NDArray[np.float64]
    dof1: npt.NDArray[np.float64]
    dof2: npt.NDArray[np.float64]


def t_contrast(C: npt.NDArray[np.floating], beta: npt.NDArray[np.floating],
               residual_variance: npt.NDArray[np.floating], bin: npt.NDArray[np.integer],
               bin_covariance: npt.NDArray[np.floating], dof: npt.NDArray[np.floating],
               tail: stats.Tail = "two-sided") -> TContrastResult:
    """t contrast maps from a stored (possibly prewhitened) fit.

    Parameters
    ----------
    C : ndarray, shape (1, n_regressors)
        Contrast row c.
    beta : ndarray, shape (n_regressors, n_voxels)
    residual_variance : ndarray, shape (n_voxels,)
        sigma^2 of the (whitened) residuals.
    bin : ndarray of int, shape (n_voxels,)
        Noise bin of each voxel (index into ``bin_covariance``).
    bin_covariance : ndarray, shape (n_bins, n_regressors, n_regressors)
        :math:`(X_w' X_w)^+` of each bin's whitened design.
    dof : ndarray, shape (n_voxels,)
        Residual degrees of freedom.
    tail : {"two-sided", "positive", "negative"}

    Returns
    -------
    TContrastResult
        effect c'b, its variance, t, z (same tail probability as t, signed)
        and p (per ``tail``); NaN where the variance is not positive.

    Notes
    -----
    :math:`\\hat e = c'\\hat\\beta`, :math:`\\operatorname{var}(\\hat e) =
    \\hat\\sigma^2 c'(X_w'X_w)^+ c`, :math:`t = \\hat e / \\sqrt{\\operatorname{var}}`
    with the voxel's bin covariance (Worsley & Friston 1995; Worsley et al.
    2002 for the prewhitened case).
    """
    c = np.atleast_2d(np.asarray(C, dtype=np.float64))
    if c.shape[0] != 1:
        raise ValueError(f"t_contrast needs one contrast row, got shape {c.shape}")
    c = c[0]
    beta = np.asarray(beta, dtype=np.float64)
    sigma2 = np.asarray(residual_variance, dtype=np.float64)
    cov = np.asarray(bin_covariance, dtype=np.float64)
    per_bin = np.einsum("i,bij,j->b", c, cov, c)
    effect = c @ beta
    variance = sigma2 * per_bin[np.asarray(bin, dtype=np.int64)]
    ok = np.isfinite(variance) & (variance > 0)
    with np.errstate(invalid="ignore", divide="ignore"):
        t = np.where(ok, effect / np.sqrt(np.where(ok, variance, 1.0)), np.nan)
    dof = np.asarray(dof, dtype=np.float64)
    log_p = stats.t_logpvalue(t, dof, tail)
    return TContrastResult(effect=effect, variance=np.where(ok, variance, np.nan), t=t, z=stats.t_to_z(t, dof),
                           p=np.exp(log_p), log_p=log_p, dof=dof)


def f_contrast(C: npt.NDArray[np.floating], beta: npt.NDArray[np.floating],
               residual_variance: npt.NDArray[np.floating], bin: npt.NDArray[np.integer],
               bin_covariance: npt.NDArray[np.floating], dof: npt.NDArray[np.floating]) -> FContrastResult:
    """F contrast maps from a stored (possibly prewhitened) fit.

    Parameters
    ----------
    C : ndarray, shape (q, n_regressors)
    beta, residual_variance, bin, bin_covariance, dof
        As in :func:`t_contrast`.

    Returns
    -------
    FContrastResult
        F, z (same upper-tail probability), p, and the numerator (rank of
        :math:`C (X_w'X_w)^+ C'`) and denominator degrees of freedom.

    Notes
    -----
    .. math::

        F = \\frac{(C\\hat\\beta)' \\,[C (X_w'X_w)^+ C']^+\\, (C\\hat\\beta)}{r\\,\\hat\\sigma^2},
        \\qquad r = \\operatorname{rank}(C (X_w'X_w)^+ C')

    (Searle 1971, sec. 5.5; Worsley & Friston 1995). The loop runs over noise
    bins, vectorised over the voxels of each bin.
    """
    C = np.atleast_2d(np.asarray(C, dtype=np.float64))
    beta = np.asarray(beta, dtype=np.float64)
    sigma2 = np.asarray(residual_variance, dtype=np.float64)
    bins = np.asarray(bin, dtype=np.int64)
    cov = np.asarray(bin_covariance, dtype=np.float64)
    effect = C @ beta                               # (q, v)
    quad = np.full(beta.shape[1], np.nan)
    rank = np.full(beta.shape[1], np.nan)
    for b in np.unique(bins):
        sel = bins == b
        M = C @ cov[b] @ C.T
        Mp = np.linalg.pinv(M, hermitian=True)
        e = effect[:, sel]
        quad[sel] = np.einsum("iv,ij,jv->v", e, Mp, e)
        rank[sel] = np.linalg.matrix_rank(M, hermitian=True)
    ok = np.isfinite(sigma2) & (sigma2 > 0) & (rank > 0)
    with np.errstate(invalid="ignore", divide="ignore"):
        f = np.where(ok, quad / (rank * np.where(ok, sigma2, 1.0)), np.nan)
    dof2 = np.asarray(dof, dtype=np.float64)
    log_p = stats.f_logpvalue(f, rank, dof2)
    return FContrastResult(f=f, z=stats.f_to_z(f, rank, dof2), p=np.exp(log_p), log_p=log_p, dof1=rank, dof2=dof2)


@dataclass
class ContrastMaps:
    """Everything the contrast step writes for one run.

    Attributes
    ----------
    kind : {"t", "F"}
    C : ndarray, shape (q, p)
    estimable : bool
    reason : str
        Why the contrast is not estimable ('' otherwise).
    efficiency : float or None
        :func:`efficiency` on the fitted design (None when not estimable).
    maps : dict of str to ndarray (v,)
        t: effect, variance, t, z, p; F: f, z, p. All NaN when not estimable.
    dof1, dof2 : float or None
        Numerator (F only) and median denominator degrees of freedom.
    """

    kind: Kind
    C: npt.NDArray[np.float64]
    estimable: bool
    reason: str
    efficiency: float | None
    maps: dict[str, npt.NDArray[np.float64]]
    dof1: float | None
    dof2: float | None


MAP_KEYS: dict[str, tuple[str, ...]] = {"t": ("effect", "variance", "t", "z", "p"), "F": ("f", "z", "p")}


def evaluate_contrast(spec: ContrastSpec, X: npt.NDArray[np.floating], names: Sequence[str],
                     conditions: Sequence[str], basis: Sequence[str], beta: npt.NDArray[np.floating],
                     residual_variance: npt.NDArray[np.floating], bin: npt.NDArray[np.integer],
                     bin_covariance: npt.NDArray[np.floating], dof: npt.NDArray[np.floating]) -> ContrastMaps:
    """Contrast matrix, estimability, efficiency and maps for one stored fit (arrays in).

    Parameters
    ----------
    spec : ContrastSpec
    X : ndarray, shape (n_scans, n_regressors)
        The design actually fitted.
    names, conditions, basis : sequence of str, length n_regressors
    beta, residual_variance, bin, bin_covariance, dof
        As in :func:`t_contrast`.

    Returns
    -------
    ContrastMaps
        When not estimable, every map is NaN and ``reason`` says why; the
        caller decides whether that is an error.

    Raises
    ------
    ContrastError
        A key of the specification matches nothing in the design.
    """
    C = contrast_matrix(spec, names, conditions, basis)
    check = estimability(X, C, names, conditions)
    n_vox = np.asarray(beta).shape[1]
    if not check.estimable:
        nan = np.full(n_vox, np.nan)
        return ContrastMaps(spec.kind, C, False, check.reason, None, {k: nan.copy() for k in MAP_KEYS[spec.kind]},
                            None, None)
    eff = efficiency(X, C)
    eff = eff if math.isfinite(eff) else None
    dof_arr = np.asarray(dof, dtype=np.float64)
    dof_med = float(np.median(dof_arr)) if dof_arr.size else None
    if spec.kind == "t":
        res = t_contrast(C, beta, residual_variance, bin, bin_covariance, dof, spec.tail)
        maps = {"effect": res.effect, "variance": res.variance, "t": res.t, "z": res.z, "p": res.p}
        return ContrastMaps("t", C, True, "", eff, maps, None, dof_med)
    fres = f_contrast(C, beta, residual_variance, bin, bin_covariance, dof)
    dof1 = float(np.nanmax(fres.dof1)) if fres.dof1.size and np.isfinite(fres.dof1).any() else None
    return ContrastMaps("F", C, True, "", eff, {"f": fres.f, "z": fres.z, "p": fres.p}, dof1, dof_med)

"""Calibration: turn ranking scores into a confidence that means P(correct).

An archivist checks a sample of hits (yes/no).  From that sample this module
fits a map from hit features to a probability, chooses a decision threshold,
and reports how trustworthy both are.  numpy only.

Pieces, in the order ``fit_calibration`` uses them:

* ``hit_features``: the inputs of the map, ``[score, raw, log(letters)]``.
* ``fit_platt``: Platt scaling, a logistic regression fitted by Newton's
  method (iteratively reweighted least squares) with a small L2 penalty on the
  weights.  The objective is::

      mean_i logloss(y_i, sigmoid(x_i . w + b)) + (l2 / 2) * ||w||^2

  (the intercept ``b`` is not penalised).  This is the objective of
  scikit-learn's ``LogisticRegression(C=C)`` divided by ``C * n``, so the two
  agree when ``C = 1 / (l2 * n)``, n = number of hits.
* ``fit_isotonic``: isotonic regression (pool-adjacent-violators), applied to
  the Platt logit, the single combined score.  Ties in the input are pooled
  first; prediction interpolates linearly between the fitted points and
  clips outside them, as ``IsotonicRegression(out_of_bounds='clip')``.
* model selection between the two by held-out log-likelihood under k-fold
  cross-validation grouped by term (one term's hits are never split over
  folds), so that the report speaks for terms the map has not seen.
* ``precision_threshold``: the decision threshold for a target precision.
* ``term_thresholds``: term-specific thresholds for term-weighted value
  (reported, not applied).
* ``calibration_report``: expected calibration error, Brier score,
  precision/recall with Wilson intervals, warnings in plain words.
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import math
import os
import tempfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Sequence
from xml.sax.saxutils import escape

import numpy as np

from . import TrawlError

FORMAT_VERSION = 1
FEATURES = ["score", "raw", "log_letters"]
ISO_CLIP = 1e-3  # isotonic probabilities are kept in [ISO_CLIP, 1 - ISO_CLIP]
TWV_BETA = 999.9  # NIST 2006 spoken term detection evaluation plan
MIN_CLASS = 30  # fewer correct (or wrong) hits than this draws a warning
MIN_TERMS = 4  # fewer terms than this draws a warning
Z95 = 1.959964  # two-sided 95% normal quantile


# --------------------------------------------------------------------------
# features


def hit_features(score: Sequence[float], raw: Sequence[float], letters: Sequence[int]) -> np.ndarray:
    """Feature matrix (n, 3): ranking score, cosine similarity, log(letters).

    Letter counts below 1 are read as 1 (log 0 is undefined).
    """
    s = np.asarray(score, dtype=float).reshape(-1)
    r = np.asarray(raw, dtype=float).reshape(-1)
    n_letters = np.asarray(letters, dtype=float).reshape(-1)
    if not (len(s) == len(r) == len(n_letters)):
        raise TrawlError("score, raw and letters must have one value per hit")
    return np.column_stack([s, r, np.log(np.maximum(n_letters, 1.0))])


# --------------------------------------------------------------------------
# Platt scaling


def _sigmoid(z: np.ndarray) -> np.ndarray:
    out = np.empty_like(z, dtype=float)
    pos = z >= 0
    out[pos] = 1.0 / (1.0 + np.exp(-z[pos]))
    ez = np.exp(z[~pos])
    out[~pos] = ez / (1.0 + ez)
    return out


@dataclass
class PlattMap:
    """p = sigmoid(X @ weights + intercept)."""

    weights: np.ndarray
    intercept: float

    def logit(self, X: np.ndarray) -> np.ndarray:
        X = _as_matrix(X)
        if X.shape[1] != len(self.weights):
            raise TrawlError(
                f"the calibration expects {len(self.weights)} features per hit, got {X.shape[1]}"
            )
        return X @ self.weights + self.intercept

    def predict(self, X: np.ndarray) -> np.ndarray:
        return _sigmoid(self.logit(X))


def fit_platt(X: np.ndarray, y: np.ndarray, l2: float = 1e-3, max_iter: int = 100, tol: float = 1e-10) -> PlattMap:
    """Logistic regression by damped Newton steps (IRLS).

    Minimises ``mean logloss + (l2/2)*||w||^2`` (intercept unpenalised);
    equal to scikit-learn's ``LogisticRegression(C=1/(l2*n))``.  Stops when
    the largest gradient component is below ``tol``.
    """
    X = _as_matrix(X)
    y = np.asarray(y, dtype=float).reshape(-1)
    n, k = X.shape
    if n == 0 or len(y) != n:
        raise TrawlError("Platt scaling needs one yes/no label per hit")
    if y.min() == y.max():
        raise TrawlError("Platt scaling needs both correct and wrong hits")
    if l2 < 0:
        raise TrawlError("the L2 penalty cannot be negative")
    A = np.column_stack([X, np.ones(n)])
    pen = np.full(k + 1, float(l2))
    pen[-1] = 0.0
    mean_y = float(np.clip(y.mean(), 1e-6, 1 - 1e-6))
    theta = np.zeros(k + 1)
    theta[-1] = math.log(mean_y / (1 - mean_y))

    def objective(t: np.ndarray) -> float:
        z = A @ t
        return float(np.mean(np.logaddexp(0.0, z) - y * z) + 0.5 * np.sum(pen * t * t))

    f = objective(theta)
    for _ in range(max_iter):
        p = _sigmoid(A @ theta)
        grad = A.T @ (p - y) / n + pen * theta
        if np.max(np.abs(grad)) < tol:
            break
        w = p * (1 - p)
        H = (A.T * w) @ A / n + np.diag(pen)
        H[np.diag_indices_from(H)] += 1e-12  # keeps the solve defined on degenerate data
        step = np.linalg.solve(H, grad)
        t = 1.0
        while t > 1e-10:
            cand = theta - t * step
            fc = objective(cand)
            if fc <= f + 1e-4 * t * float(grad @ -step) or fc <= f:
                break
            t *= 0.5
        theta, f_new = cand, fc
        if abs(f - f_new) < 1e-16 and t < 1e-9:
            break
        f = f_new
    return PlattMap(weights=theta[:-1].copy(), intercept=float(theta[-1]))


# --------------------------------------------------------------------------
# isotonic regression


@dataclass
class IsotonicMap:
    """Non-decreasing piecewise-linear map through (knots_x, knots_y), clipped at the ends."""

    knots_x: np.ndarray
    knots_y: np.ndarray

    def predict(self, x: np.ndarray) -> np.ndarray:
        x = np.asarray(x, dtype=float).reshape(-1)
        return np.interp(x, self.knots_x, self.knots_y)


def fit_isotonic(x: np.ndarray, y: np.ndarray) -> IsotonicMap:
    """Non-decreasing least-squares fit by pool-adjacent-violators.

    Hits with equal ``x`` are pooled first (their mean label, weighted by
    count), then adjacent blocks that violate the order are merged.
    """
    x = np.asarray(x, dtype=float).reshape(-1)
    y = np.asarray(y, dtype=float).reshape(-1)
    if len(x) == 0 or len(x) != len(y):
        raise TrawlError("isotonic regression needs one label per value")
    ux, inverse, counts = np.unique(x, return_inverse=True, return_counts=True)
    sums = np.bincount(inverse, weights=y, minlength=len(ux))
    # stack of blocks: [total weight, weighted sum, number of distinct x]
    blocks: list[list[float]] = []
    for s, c in zip(sums, counts):
        blocks.append([float(c), float(s), 1])
        while len(blocks) > 1 and blocks[-2][1] / blocks[-2][0] >= blocks[-1][1] / blocks[-1][0]:
            w2, s2, m2 = blocks.pop()
            blocks[-1][0] += w2
            blocks[-1][1] += s2
            blocks[-1][2] += m2
    fitted = np.concatenate([np.full(int(m), s / w) for w, s, m in blocks])
    return IsotonicMap(knots_x=ux, knots_y=fitted)


# --------------------------------------------------------------------------
# grouped cross-validation


def term_folds(term_ids: Sequence[Any], folds: int = 5) -> np.ndarray:
    """Fold number (0..folds-1) of every hit; all hits of a term share one fold.

    Terms are dealt, largest first, to the fold holding the fewest hits so
    far (ties: the lower fold number; equal-sized terms in order of first
    appearance), which balances fold sizes deterministically.  ``folds`` is
    reduced to the number of terms when there are fewer terms.
    """
    inverse, n_terms = _term_index(term_ids)
    folds = max(1, min(int(folds), n_terms))
    counts = np.bincount(inverse, minlength=n_terms)
    first = np.full(n_terms, len(inverse))
    np.minimum.at(first, inverse, np.arange(len(inverse)))
    order = sorted(range(n_terms), key=lambda t: (-counts[t], first[t]))
    load = np.zeros(folds, dtype=int)
    fold_of_term = np.zeros(n_terms, dtype=int)
    for t in order:
        f = int(np.argmin(load))
        fold_of_term[t] = f
        load[f] += counts[t]
    return fold_of_term[inverse]


def out_of_fold(X: np.ndarray, y: np.ndarray, term_ids: Sequence[Any], folds: int = 5, l2: float = 1e-3) -> dict[str, Any]:
    """Held-out predictions of both candidate maps under term-grouped CV.

    Returns ``{"fold": fold per hit, "platt": probs, "isotonic": probs,
    "warnings": [...]}``.  Each hit's predictions come from maps fitted on
    the other folds only.  Isotonic probabilities are clipped to
    [ISO_CLIP, 1 - ISO_CLIP].  A training split holding only one class
    predicts its (clipped) class rate for both candidates and adds a warning.
    """
    X = _as_matrix(X)
    y = np.asarray(y, dtype=float).reshape(-1)
    fold = term_folds(term_ids, folds)
    platt = np.empty(len(y))
    iso = np.empty(len(y))
    warnings: list[str] = []
    for f in range(int(fold.max()) + 1):
        test = fold == f
        train = ~test
        ytr = y[train]
        if ytr.min() == ytr.max():
            const = float(np.clip(ytr.mean(), ISO_CLIP, 1 - ISO_CLIP))
            platt[test] = const
            iso[test] = const
            warnings.append(
                f"In cross-validation fold {f + 1} the other terms' hits were all "
                f"{'correct' if const > 0.5 else 'wrong'}; check hits of more terms."
            )
            continue
        pm = fit_platt(X[train], ytr, l2=l2)
        im = fit_isotonic(pm.logit(X[train]), ytr)
        platt[test] = pm.predict(X[test])
        iso[test] = np.clip(im.predict(pm.logit(X[test])), ISO_CLIP, 1 - ISO_CLIP)
    return {"fold": fold, "platt": platt, "isotonic": iso, "warnings": warnings}


def mean_log_likelihood(probs: np.ndarray, labels: np.ndarray) -> float:
    """Mean log-likelihood per hit of yes/no labels under probabilities (clipped to [1e-12, 1-1e-12])."""
    p = np.clip(np.asarray(probs, dtype=float), 1e-12, 1 - 1e-12)
    y = np.asarray(labels, dtype=float)
    return float(np.mean(y * np.log(p) + (1 - y) * np.log1p(-p)))


# --------------------------------------------------------------------------
# thresholds and intervals


def wilson_interval(k: int, n: int, z: float = Z95) -> tuple[float, float]:
    """Wilson score interval for k successes in n trials; (0, 1) when n is 0."""
    if n <= 0:
        return (0.0, 1.0)
    if k < 0 or k > n:
        raise TrawlError("successes must lie between 0 and the number of trials")
    p = k / n
    z2 = z * z
    denom = 1 + z2 / n
    centre = (p + z2 / (2 * n)) / denom
    half = z / denom * math.sqrt(p * (1 - p) / n + z2 / (4 * n * n))
    return (max(0.0, centre - half), min(1.0, centre + half))


def precision_threshold(probs: np.ndarray, labels: np.ndarray, target: float = 0.9) -> tuple[float, bool]:
    """Lowest threshold whose accepted set has precision >= target.

    Candidates are the distinct values of ``probs``; a threshold t accepts
    the hits with ``probs >= t``.  Returns ``(t, True)`` for the smallest
    candidate t at which (correct accepted) / (accepted) >= target.  When no
    candidate reaches the target, returns ``(nextafter(1, 2), False)``: a
    threshold above every probability, so nothing is accepted.
    """
    p = np.asarray(probs, dtype=float).reshape(-1)
    y = np.asarray(labels, dtype=float).reshape(-1)
    order = np.argsort(-p, kind="stable")
    ps, ys = p[order], y[order]
    tp = np.cumsum(ys)
    acc = np.arange(1, len(ps) + 1)
    last_of_group = np.r_[ps[1:] != ps[:-1], True]  # end of each run of equal values
    ok = last_of_group & (tp >= target * acc - 1e-12)
    if not ok.any():
        return (math.nextafter(1.0, 2.0), False)
    i = int(np.nonzero(ok)[0][-1])
    return (float(ps[i]), True)


def twv_threshold(n_true: float, total_seconds: float, beta: float = TWV_BETA) -> float:
    """Term-specific threshold maximising expected term-weighted value.

    Accept a hit of the term when P(correct) > beta*N / (T + (beta-1)*N),
    N = expected true occurrences of the term, T = total searched seconds
    (non-speech included).
    """
    if not total_seconds or total_seconds <= 0:
        raise TrawlError("a term-weighted value threshold needs the total searched seconds")
    return float(beta * n_true / (total_seconds + (beta - 1) * n_true))


def term_thresholds(
    probs: np.ndarray, term_ids: Sequence[Any], total_seconds: float, beta: float = TWV_BETA
) -> dict[str, dict[str, float]]:
    """Per term: N_true estimated as the sum of its hits' calibrated probabilities, and its TWV threshold.

    Pass the confidences of *all* of a term's hits in the searched audio: over a
    checked sample only, the sum under-counts N_true.
    """
    p = np.asarray(probs, dtype=float).reshape(-1)
    keys = [str(t) for t in term_ids]
    if len(keys) != len(p):
        raise TrawlError("one term per hit is needed")
    n_true: dict[str, float] = {}
    for k, v in zip(keys, p):
        n_true[k] = n_true.get(k, 0.0) + float(v)
    return {k: {"n_true": v, "threshold": twv_threshold(v, total_seconds, beta)} for k, v in n_true.items()}


# --------------------------------------------------------------------------
# quality


def expected_calibration_error(probs: np.ndarray, labels: np.ndarray, bins: int = 10) -> float:
    """ECE over equal-width bins of [0, 1], each weighted by its share of hits.

    Bin b holds probabilities in [b/bins, (b+1)/bins) (the last bin includes 1);
    ECE = sum_b (n_b / n) * |mean label in b - mean probability in b|.
    """
    p = np.asarray(probs, dtype=float).reshape(-1)
    y = np.asarray(labels, dtype=float).reshape(-1)
    stats = _bin_stats(p, y, bins)
    n = len(p)
    return float(sum(c / n * abs(fy - mp) for c, mp, fy in stats if c))


def brier_score(probs: np.ndarray, labels: np.ndarray) -> float:
    """Mean squared difference between probability and the 0/1 label."""
    p = np.asarray(probs, dtype=float)
    y = np.asarray(labels, dtype=float)
    return float(np.mean((p - y) ** 2))


def calibration_report(
    probs: np.ndarray, labels: np.ndarray, term_ids: Sequence[Any], threshold: float, target_precision: float
) -> dict[str, Any]:
    """Quality of a calibration on held-out probabilities, with warnings in plain words.

    Recall is relative to the correct hits in the checked sample, not to
    every occurrence in the archive.
    """
    p = np.asarray(probs, dtype=float).reshape(-1)
    y = np.asarray(labels, dtype=float).reshape(-1)
    _, n_terms = _term_index(term_ids)
    n_yes = int(y.sum())
    n_no = int(len(y) - n_yes)
    accepted = p >= threshold
    tp = int(y[accepted].sum())
    n_acc = int(accepted.sum())
    prec = tp / n_acc if n_acc else float("nan")
    rec = tp / n_yes if n_yes else float("nan")
    prec_ci = wilson_interval(tp, n_acc)
    rec_ci = wilson_interval(tp, n_yes)
    warnings: list[str] = []
    if n_yes < MIN_CLASS:
        warnings.append(f"Only {n_yes} checked hits are correct; check at least {MIN_CLASS} correct hits for a reliable calibration.")
    if n_no < MIN_CLASS:
        warnings.append(f"Only {n_no} checked hits are wrong; check at least {MIN_CLASS} wrong hits for a reliable calibration.")
    if n_terms < MIN_TERMS:
        warnings.append(f"Only {n_terms} terms were checked; check hits of at least {MIN_TERMS} different terms.")
    if n_acc == 0:
        warnings.append(f"No threshold reaches {target_precision:.0%} precision on the checked sample; nothing will be accepted.")
    elif prec_ci[0] < target_precision:
        warnings.append(
            f"At the chosen threshold, precision is {prec:.0%} but could be as low as {prec_ci[0]:.0%} "
            f"(95% interval); check more hits to be confident of {target_precision:.0%}."
        )
    return {
        "n": int(len(y)),
        "n_correct": n_yes,
        "n_wrong": n_no,
        "n_terms": int(n_terms),
        "ece": expected_calibration_error(p, y),
        "brier": brier_score(p, y),
        "accepted": n_acc,
        "precision": _json_float(prec),
        "precision_ci": list(prec_ci),
        "recall": _json_float(rec),
        "recall_ci": list(rec_ci),
        "warnings": warnings,
    }


# --------------------------------------------------------------------------
# the calibration record


@dataclass
class Calibration:
    """A fitted calibration: the map, its threshold and how good it is.

    ``parameters`` holds ``features``, ``weights``, ``intercept``, ``l2`` and,
    for ``method == "isotonic"``, ``iso_x``/``iso_y`` (knots over the Platt logit).
    """

    method: str  # "platt" or "isotonic"
    parameters: dict[str, Any]
    threshold: float  # accept a hit when confidence >= threshold
    target_precision: float
    twv: dict[str, Any] = field(default_factory=dict)
    report: dict[str, Any] = field(default_factory=dict)
    version: int = FORMAT_VERSION
    sample_hash: str = ""
    created: str = ""

    def _platt(self) -> PlattMap:
        return PlattMap(np.asarray(self.parameters["weights"], dtype=float), float(self.parameters["intercept"]))

    def confidence(self, X: np.ndarray) -> np.ndarray:
        """Calibrated P(correct) for each row of the feature matrix."""
        X = _as_matrix(X)
        pm = self._platt()
        if self.method == "platt":
            return pm.predict(X)
        im = IsotonicMap(np.asarray(self.parameters["iso_x"], dtype=float), np.asarray(self.parameters["iso_y"], dtype=float))
        return np.clip(im.predict(pm.logit(X)), ISO_CLIP, 1 - ISO_CLIP)

    def accept(self, X: np.ndarray) -> np.ndarray:
        """Boolean per hit: confidence at or above the threshold."""
        return self.confidence(X) >= self.threshold

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe dictionary (plain floats, lists and strings)."""
        return {
            "version": int(self.version),
            "method": self.method,
            "parameters": _jsonable(self.parameters),
            "threshold": float(self.threshold),
            "target_precision": float(self.target_precision),
            "twv": _jsonable(self.twv),
            "report": _jsonable(self.report),
            "sample_hash": self.sample_hash,
            "created": self.created,
        }

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> "Calibration":
        """Read back a dictionary written by ``to_dict``; refuses other formats in plain words."""
        if not isinstance(d, dict):
            raise TrawlError("the calibration file does not hold a calibration")
        version = d.get("version")
        if version != FORMAT_VERSION:
            raise TrawlError(f"the calibration file has format version {version}; this Trawl reads version {FORMAT_VERSION}")
        method = d.get("method")
        params = d.get("parameters")
        if method not in ("platt", "isotonic") or not isinstance(params, dict):
            raise TrawlError("the calibration file is damaged: unknown method or missing parameters")
        needed = ["weights", "intercept"] + (["iso_x", "iso_y"] if method == "isotonic" else [])
        missing = [k for k in needed if k not in params]
        if missing or "threshold" not in d:
            raise TrawlError(f"the calibration file is damaged: missing {', '.join(missing or ['threshold'])}")
        return cls(
            method=method,
            parameters=dict(params),
            threshold=float(d["threshold"]),
            target_precision=float(d.get("target_precision", 0.9)),
            twv=dict(d.get("twv", {})),
            report=dict(d.get("report", {})),
            version=int(version),
            sample_hash=str(d.get("sample_hash", "")),
            created=str(d.get("created", "")),
        )


def fit_calibration(
    X: np.ndarray,
    y: Sequence[int] | np.ndarray,
    term_ids: Sequence[Any],
    target_precision: float = 0.9,
    folds: int = 5,
    total_seconds: float | None = None,
    sample_hash: str = "",
    l2: float = 1e-3,
) -> Calibration:
    """Fit a calibration to a checked sample.

    ``X``: features per hit (``hit_features``); ``y``: 1 = correct, 0 = wrong;
    ``term_ids``: the term of each hit.  The method (Platt, or isotonic on the
    Platt logit) with the higher held-out mean log-likelihood under
    term-grouped cross-validation wins (Platt on a tie).  The threshold and
    the report come from the winner's out-of-fold predictions; the map
    itself is refitted on the whole sample.  TWV thresholds are computed when
    ``total_seconds`` is given.  ``sample_hash`` defaults to a SHA-256 of the inputs.
    """
    X, yv, terms = _validate(X, y, term_ids)
    if not 0.0 < target_precision < 1.0:
        raise TrawlError("the target precision must lie strictly between 0 and 1")
    if folds < 2:
        raise TrawlError("cross-validation needs at least 2 folds")
    oof = out_of_fold(X, yv, terms, folds=folds, l2=l2)
    ll = {m: mean_log_likelihood(oof[m], yv) for m in ("platt", "isotonic")}
    method = "isotonic" if ll["isotonic"] > ll["platt"] else "platt"
    held_out = oof[method]
    threshold, _met = precision_threshold(held_out, yv, target_precision)

    pm = fit_platt(X, yv, l2=l2)
    params: dict[str, Any] = {
        "features": FEATURES if X.shape[1] == len(FEATURES) else [f"x{i}" for i in range(X.shape[1])],
        "weights": pm.weights.tolist(),
        "intercept": pm.intercept,
        "l2": l2,
    }
    if method == "isotonic":
        im = fit_isotonic(pm.logit(X), yv)
        params["iso_x"] = im.knots_x.tolist()
        params["iso_y"] = im.knots_y.tolist()

    report = calibration_report(held_out, yv, terms, threshold, target_precision)
    report["method_log_likelihood"] = ll
    report["folds"] = int(oof["fold"].max()) + 1
    report["out_of_fold"] = [round(float(p), 6) for p in held_out]  # for the reliability diagram
    report["warnings"] = oof["warnings"] + report["warnings"]

    cal = Calibration(
        method=method,
        parameters=params,
        threshold=threshold,
        target_precision=float(target_precision),
        report=report,
        sample_hash=sample_hash or _digest(X, yv, terms),
        created=_dt.date.today().isoformat(),
    )
    twv: dict[str, Any] = {
        "beta": TWV_BETA,
        "total_seconds": total_seconds,
        "rule": "accept when confidence > beta*N_true / (T + (beta-1)*N_true); N_true = sum of the term's confidences",
        "applied": False,
        "per_term": {},
    }
    if total_seconds:
        twv["per_term"] = term_thresholds(cal.confidence(X), terms, total_seconds)
        twv["note"] = "computed over the checked sample only, which under-counts N_true; search recomputes it over all hits"
    else:
        twv["note"] = "needs the total searched seconds T"
    cal.twv = twv
    return cal


# --------------------------------------------------------------------------
# reliability diagram


def reliability_svg(probs: np.ndarray, labels: np.ndarray, path: str | os.PathLike[str], bins: int = 10, title: str = "Reliability") -> None:
    """Write a reliability diagram as a standalone SVG file (written atomically).

    One bar per equal-width bin at its fraction of correct hits, a dot at the
    bin's mean confidence, the hit count above each bar, and the diagonal of
    perfect calibration.
    """
    p = np.asarray(probs, dtype=float).reshape(-1)
    y = np.asarray(labels, dtype=float).reshape(-1)
    stats = _bin_stats(p, y, bins)
    W, H, L, R, T, B = 480, 480, 70, 20, 50, 60
    pw, ph = W - L - R, H - T - B

    def sx(v: float) -> float:
        return L + v * pw

    def sy(v: float) -> float:
        return T + (1 - v) * ph

    out = [
        f'<svg xmlns="http://www.w3.org/2000/svg" width="{W}" height="{H}" viewBox="0 0 {W} {H}" font-family="sans-serif" font-size="12">',
        f'<rect x="0" y="0" width="{W}" height="{H}" fill="white"/>',
        f'<text x="{W / 2:.1f}" y="24" text-anchor="middle" font-size="15">{escape(title)} '
        f"(n={len(p)}, ECE={expected_calibration_error(p, y, bins):.3f})</text>",
    ]
    for b, (c, mp, fy) in enumerate(stats):
        if not c:
            continue
        x0, x1 = sx(b / bins), sx((b + 1) / bins)
        out.append(
            f'<rect x="{x0 + 1:.1f}" y="{sy(fy):.1f}" width="{x1 - x0 - 2:.1f}" height="{sy(0) - sy(fy):.1f}" '
            f'fill="#7fa7d9" stroke="#2c5d99"/>'
        )
        out.append(f'<circle cx="{sx(mp):.1f}" cy="{sy(fy):.1f}" r="3" fill="#c0392b"/>')
        out.append(f'<text x="{(x0 + x1) / 2:.1f}" y="{sy(fy) - 5:.1f}" text-anchor="middle" font-size="10">{c}</text>')
    out.append(f'<line x1="{sx(0)}" y1="{sy(0)}" x2="{sx(1)}" y2="{sy(1)}" stroke="#555" stroke-dasharray="5,4"/>')
    out.append(f'<line x1="{sx(0)}" y1="{sy(0)}" x2="{sx(1)}" y2="{sy(0)}" stroke="black"/>')
    out.append(f'<line x1="{sx(0)}" y1="{sy(0)}" x2="{sx(0)}" y2="{sy(1)}" stroke="black"/>')
    for i in range(6):
        v = i / 5
        out.append(f'<line x1="{sx(v):.1f}" y1="{sy(0)}" x2="{sx(v):.1f}" y2="{sy(0) + 5}" stroke="black"/>')
        out.append(f'<text x="{sx(v):.1f}" y="{sy(0) + 18}" text-anchor="middle">{v:.1f}</text>')
        out.append(f'<line x1="{sx(0) - 5}" y1="{sy(v):.1f}" x2="{sx(0)}" y2="{sy(v):.1f}" stroke="black"/>')
        out.append(f'<text x="{sx(0) - 8}" y="{sy(v) + 4:.1f}" text-anchor="end">{v:.1f}</text>')
    out.append(f'<text x="{L + pw / 2:.1f}" y="{H - 15}" text-anchor="middle">Calibrated confidence</text>')
    out.append(
        f'<text x="18" y="{T + ph / 2:.1f}" text-anchor="middle" transform="rotate(-90 18 {T + ph / 2:.1f})">'
        "Fraction of hits correct</text>"
    )
    out.append("</svg>\n")
    _atomic_write(Path(path), "\n".join(out))


# --------------------------------------------------------------------------
# choosing hits to check


def suggest_sample(hits: Sequence[Any], n: int, seed: int = 0) -> list[Any]:
    """Choose ``n`` hits to check, spread over terms and over score ranges.

    Picks are dealt round-robin over the terms (in an order shuffled by
    ``seed``) until ``n`` are dealt or every hit is taken.  Within a term
    given k picks, its hits sorted by score are cut into k equal-count
    quantile strata and one hit is drawn at random from each, so each term's
    picks span its low, middle and high scores.  Hits need ``term`` and
    ``score`` attributes; the result keeps the input order.  Deterministic
    for a given seed.
    """
    if n <= 0 or not hits:
        return []
    rng = np.random.default_rng(seed)
    by_term: dict[str, list[int]] = {}
    for i, h in enumerate(hits):
        if not math.isfinite(float(h.score)):
            raise TrawlError(f"hit {i + 1} of term '{h.term}' has no finite score")
        by_term.setdefault(str(h.term), []).append(i)
    terms = list(by_term)
    terms = [terms[j] for j in rng.permutation(len(terms))]
    quota = dict.fromkeys(terms, 0)
    left = min(int(n), len(hits))
    while left:
        for t in terms:
            if left and quota[t] < len(by_term[t]):
                quota[t] += 1
                left -= 1
    chosen: list[int] = []
    for t in terms:
        k = quota[t]
        if not k:
            continue
        idx = sorted(by_term[t], key=lambda i: (float(hits[i].score), i))
        edges = np.linspace(0, len(idx), k + 1)
        for s in range(k):
            lo, hi = int(round(edges[s])), int(round(edges[s + 1]))
            hi = max(hi, lo + 1)
            chosen.append(idx[int(rng.integers(lo, hi))])
    return [hits[i] for i in sorted(chosen)]


ADAPT_PER_ROUND = 2  # hits per term and round in an adaptation sample (best_first_sample)


def best_first_depth(n: int, n_terms: int, per_round: int = ADAPT_PER_ROUND) -> int:
    """How many of each term's best hits `best_first_sample` can reach when it picks ``n`` over
    ``n_terms`` terms: whole rounds of ``per_round``, one round at least."""
    return per_round * max(1, -(-n // (per_round * max(n_terms, 1))))


def best_first_sample(ranked: Sequence[Sequence[Any]], n: int, per_round: int = ADAPT_PER_ROUND) -> list[Any]:
    """Choose ``n`` hits to check for adaptation: the ``per_round`` best hits of every term,
    then the next ``per_round`` of every term, and so on, terms in the order given, until ``n``
    are chosen or every hit is taken. ``ranked``: per term, its hits best first. Returns them
    term by term.

    Unlike a calibration sample (which needs the whole score range), adaptation learns from
    confirmed hits, and a term's best hits are the likeliest to be confirmed; spreading the
    checks over many terms gives the rule learner many different spellings. Two per term, not
    one: a term's runner-up is most often a near miss that sounds like it, the hard negative
    that tells a right respelling from a wrong one. With one hit per term, each confirmed hit
    is one its typed spelling already ranked first, and the held-out check then sees little
    but that selection (on the development split, 1 per term: rules switched on in 1 of 5
    deals; 2 per term: 4 of 5).
    """
    if n <= 0:
        return []
    if per_round < 1:
        raise TrawlError(f"per_round must be at least 1, not {per_round}")
    depth = [0] * len(ranked)
    left, rank = int(n), 0
    while left and rank < max((len(r) for r in ranked), default=0):
        for j, r in enumerate(ranked):
            take = min(per_round, left, max(len(r) - rank, 0))
            depth[j] += take
            left -= take
        rank += per_round
    return [h for r, k in zip(ranked, depth) for h in r[:k]]


# --------------------------------------------------------------------------
# helpers


def _as_matrix(X: Any) -> np.ndarray:
    X = np.asarray(X, dtype=float)
    if X.ndim == 1:
        X = X.reshape(-1, 1)
    if X.ndim != 2:
        raise TrawlError("features must be a table with one row per hit")
    return X


def _term_index(term_ids: Sequence[Any]) -> tuple[np.ndarray, int]:
    keys = [str(t) for t in term_ids]
    uniq: dict[str, int] = {}
    inverse = np.array([uniq.setdefault(k, len(uniq)) for k in keys], dtype=int)
    return inverse, len(uniq)


def _validate(X: Any, y: Any, term_ids: Sequence[Any]) -> tuple[np.ndarray, np.ndarray, list[str]]:
    try:
        X = _as_matrix(X)
        yv = np.asarray(y, dtype=float).reshape(-1)
    except (TypeError, ValueError) as e:
        raise TrawlError(f"the checked sample could not be read as numbers: {e}") from None
    terms = [str(t) for t in term_ids]
    if X.shape[0] == 0:
        raise TrawlError("the checked sample is empty: mark some hits yes or no first")
    if not (X.shape[0] == len(yv) == len(terms)):
        raise TrawlError("the checked sample needs one verdict and one term per hit")
    if not np.all(np.isfinite(X)):
        raise TrawlError("some checked hits have missing or infinite scores")
    if not np.all(np.isin(yv, (0.0, 1.0))):
        raise TrawlError("verdicts must be yes (1) or no (0)")
    if yv.min() == yv.max():
        word = "yes" if yv[0] == 1 else "no"
        raise TrawlError(f"every checked hit is marked {word}; calibration needs both correct and wrong hits")
    if len(set(terms)) < 2:
        raise TrawlError("the checked sample covers only one term; check hits of at least 2 terms (4 or more is better)")
    return X, yv, terms


def _bin_stats(p: np.ndarray, y: np.ndarray, bins: int) -> list[tuple[int, float, float]]:
    """(count, mean probability, fraction correct) per equal-width bin."""
    if bins < 1:
        raise TrawlError("a reliability diagram needs at least one bin")
    b = np.minimum((p * bins).astype(int), bins - 1)
    b = np.maximum(b, 0)
    stats = []
    for i in range(bins):
        m = b == i
        c = int(m.sum())
        stats.append((c, float(p[m].mean()) if c else 0.0, float(y[m].mean()) if c else 0.0))
    return stats


def _digest(X: np.ndarray, y: np.ndarray, terms: list[str]) -> str:
    h = hashlib.sha256()
    h.update(np.ascontiguousarray(X, dtype="<f8").tobytes())
    h.update(np.ascontiguousarray(y, dtype="<f8").tobytes())
    h.update("\x1f".join(terms).encode("utf-8"))
    return h.hexdigest()


def _json_float(v: float) -> float | None:
    return None if not math.isfinite(v) else float(v)


def _jsonable(v: Any) -> Any:
    if isinstance(v, dict):
        return {str(k): _jsonable(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [_jsonable(x) for x in v]
    if isinstance(v, np.ndarray):
        return [_jsonable(x) for x in v.tolist()]
    if isinstance(v, (np.floating, float)):
        return _json_float(float(v))
    if isinstance(v, (np.integer,)):
        return int(v)
    if isinstance(v, np.bool_):
        return bool(v)
    return v


def _atomic_write(path: Path, text: str) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as f:
            f.write(text)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise

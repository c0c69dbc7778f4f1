"""Query-side adaptation: a small learned map after the spelling encoder.

The archive's index is never touched. From hits the archivist checked by ear we
fit a d×d matrix M; a term's query becomes ``normalize(M q)`` where ``q`` is the
base spelling encoder's unit vector. Every indexed vector stays valid.

Objective, minimised by full-batch Adam from M = I (numpy only, deterministic)::

    mean_i  logistic_loss((s_i - b) / T, y_i)            s_i = cos(M q_i, a_i)
  + pull * mean_{i confirmed} (1 - cos(M q_i, c_t(i)))   c_t = mean confirmed audio of term t
  + lam  * ||M - I||_F^2                                  ridge regularisation toward identity

``a_i`` is the audio embedding of hit i's window, ``y_i`` its verdict (1
confirmed, 0 rejected), ``b`` a learned offset and ``T`` a temperature. The
ridge term keeps a few dozen hits from pulling M far from the identity.

Whether the map helps is measured by cross-validation over terms: terms are
dealt into folds; each fold's map is fitted without any hit of its held-out
terms and evaluated on them. For each held-out term that has both confirmed and
rejected hits, average precision (AP) ranks its checked hits by cosine with the
query, before (identity) and after (the fold's map); the report gives the mean
over these terms (MAP) both ways. The map is *enabled* when
``after_map >= before_map + min_gain`` and, when ``significance`` is given, a one-sided
paired t-test over the held-out terms (Student's t on the per-term AP gains, as
scipy.stats.ttest_rel) finds the gain at that level: with a few dozen terms, and
checked hits that are the queries' own best hits, a point gain is often noise
that the map then costs on other terms. ``min_gain`` defaults to 0 and may not
be below ``-MAX_TOLERATED_LOSS`` (0.02): a map that makes held-out MAP worse by
more than 0.02 is never enabled. A disabled map is still returned (with its
report) so that it can be inspected; search should then use the identity
(`QueryMap.enabled`).

No checked hits at all gives exactly the identity. A sample with fewer than
``MIN_HITS`` checked hits, fewer than ``MIN_TERMS`` terms, or no confirmed hit
is refused with a TrawlError.
"""

from __future__ import annotations

import hashlib
import json
import math
from dataclasses import dataclass, field
from datetime import datetime, timezone
from typing import Any, Sequence

import numpy as np

from . import TrawlError
from .evaluation import average_precision, ranked_ap, sampled_mtwv

FORMAT_VERSION = 1
MIN_HITS = 10
MIN_TERMS = 3
MAX_TOLERATED_LOSS = 0.02  # the largest drop in held-out MAP a map may cost and still be enabled
_TINY = 1e-12


def _now() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="seconds")


def _unit_rows(x: np.ndarray, what: str) -> np.ndarray:
    norms = np.linalg.norm(x, axis=1, keepdims=True)
    if np.any(norms <= _TINY):
        raise TrawlError(f"{what} contains a zero vector; embeddings must be unit vectors")
    return x / norms


@dataclass
class QueryMap:
    """A d×d map applied to spelling-encoder queries: ``normalize(matrix @ q)``."""

    matrix: np.ndarray
    version: int = FORMAT_VERSION
    sample_hash: str = ""  # SHA-256 of the checked sample it was fitted on
    created: str = ""  # ISO 8601 time (UTC) of fitting
    report: dict[str, Any] = field(default_factory=dict)

    @property
    def dim(self) -> int:
        return int(self.matrix.shape[0])

    @property
    def enabled(self) -> bool:
        """Whether cross-validation found the map at least as good as the identity."""
        return bool(self.report.get("enabled", False))

    @classmethod
    def identity(cls, d: int) -> "QueryMap":
        if d < 1:
            raise TrawlError(f"a query map needs a dimension of at least 1, not {d}")
        return cls(np.eye(d), report={"enabled": False, "reason": "identity map"})

    def apply(self, queries: np.ndarray) -> np.ndarray:
        """Mapped queries as unit rows; ``queries`` is (d,) or (n, d). float32 stays float32."""
        x = np.asarray(queries)
        out_dtype = np.float32 if x.dtype == np.float32 else np.float64
        x2 = np.atleast_2d(x.astype(np.float64))
        if x2.ndim != 2 or x2.shape[1] != self.dim:
            raise TrawlError(
                f"the query map is {self.dim}-dimensional but the queries have shape {x.shape}"
            )
        y = x2 @ self.matrix.T
        norms = np.linalg.norm(y, axis=1, keepdims=True)
        if np.any(norms <= _TINY) or not np.all(np.isfinite(y)):
            raise TrawlError("the query map sends a query to zero; refit it or use the identity")
        out = (y / norms).astype(out_dtype)
        return out[0] if x.ndim == 1 else out

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe form; floats are Python floats, so they round-trip exactly through JSON."""
        return {
            "version": self.version,
            "matrix": [[float(v) for v in row] for row in self.matrix],
            "sample_hash": self.sample_hash,
            "created": self.created,
            "report": json.loads(json.dumps(self.report)),
        }

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> "QueryMap":
        if not isinstance(data, dict) or "matrix" not in data:
            raise TrawlError("not a query map: no 'matrix' entry")
        if data.get("version") != FORMAT_VERSION:
            raise TrawlError(
                f"query map format version {data.get('version')!r} is not supported "
                f"(this Trawl reads version {FORMAT_VERSION})"
            )
        try:
            m = np.array(data["matrix"], dtype=np.float64)
        except (TypeError, ValueError):
            raise TrawlError("the query map's matrix is not a table of numbers") from None
        if m.ndim != 2 or m.shape[0] != m.shape[1] or m.shape[0] < 1:
            raise TrawlError(f"the query map's matrix must be square, not of shape {m.shape}")
        if not np.all(np.isfinite(m)):
            raise TrawlError("the query map's matrix holds a non-finite number")
        return cls(
            m,
            version=FORMAT_VERSION,
            sample_hash=str(data.get("sample_hash", "")),
            created=str(data.get("created", "")),
            report=dict(data.get("report", {})),
        )


@dataclass(frozen=True)
class _Sample:
    q: np.ndarray  # (n, d) unit rows, float64, private copy
    a: np.ndarray  # (n, d) unit rows
    y: np.ndarray  # (n,) float64 of 0.0 / 1.0
    terms: tuple[str, ...]


def _sample(q: np.ndarray, a: np.ndarray, y: Sequence[Any], term_ids: Sequence[Any]) -> _Sample:
    qa = np.array(q, dtype=np.float64)  # np.array copies: the caller's arrays are never touched
    aa = np.array(a, dtype=np.float64)
    ya = np.array(y)
    terms = tuple(str(t) for t in np.asarray(term_ids, dtype=object).reshape(-1))
    if qa.ndim != 2 or aa.ndim != 2:
        raise TrawlError(
            f"q and a must be tables (hits × dimensions), not of shapes {qa.shape} and {aa.shape}"
        )
    n = qa.shape[0]
    if aa.shape != qa.shape or ya.shape != (n,) or len(terms) != n:
        raise TrawlError(
            f"the checked sample does not line up: q {qa.shape}, a {aa.shape}, "
            f"{ya.size} verdicts, {len(terms)} term ids"
        )
    if not (np.all(np.isfinite(qa)) and np.all(np.isfinite(aa))):
        raise TrawlError("the checked sample holds a non-finite embedding value")
    try:
        yf = ya.astype(np.float64)
    except (TypeError, ValueError):
        raise TrawlError("verdicts must be 1 (confirmed) or 0 (rejected)") from None
    if not np.all((yf == 0.0) | (yf == 1.0)):
        bad = int(np.nonzero((yf != 0.0) & (yf != 1.0))[0][0])
        raise TrawlError(
            f"verdict of checked hit {bad + 1} is {ya[bad]!r}; use 1 (confirmed) or 0 (rejected)"
        )
    if n == 0:
        return _Sample(qa, aa, yf, terms)
    return _Sample(_unit_rows(qa, "q"), _unit_rows(aa, "a"), yf, terms)


def _sample_hash(q: np.ndarray, a: np.ndarray, y: Sequence[Any], term_ids: Sequence[Any]) -> str:
    h = hashlib.sha256()
    qa = np.ascontiguousarray(q, dtype="<f8")
    h.update(f"{qa.shape}".encode())
    h.update(qa.tobytes())
    h.update(np.ascontiguousarray(a, dtype="<f8").tobytes())
    h.update(np.ascontiguousarray(np.asarray(y, dtype=np.float64), dtype="<f8").tobytes())
    h.update(json.dumps([str(t) for t in np.asarray(term_ids, dtype=object).reshape(-1)]).encode())
    return h.hexdigest()


def _term_targets(s: _Sample) -> np.ndarray:
    """Per hit: the unit mean of its term's confirmed audio (zero rows for terms with none)."""
    c = np.zeros_like(s.a)
    terms = np.array(s.terms, dtype=object)
    for t in set(s.terms):
        idx = np.nonzero(terms == t)[0]
        conf = idx[s.y[idx] == 1.0]
        if conf.size:
            m = s.a[conf].mean(axis=0)
            norm = np.linalg.norm(m)
            if norm > _TINY:
                c[idx] = m / norm
    return c


def _objective(
    m: np.ndarray,
    b: float,
    s: _Sample,
    c: np.ndarray,
    lam: float,
    temperature: float,
    pull: float,
) -> tuple[float, np.ndarray, float]:
    """Objective value and its gradients with respect to M and b (see the module doc)."""
    n = s.q.shape[0]
    u = s.q @ m.T
    norms = np.linalg.norm(u, axis=1)
    norms = np.maximum(norms, _TINY)
    v = u / norms[:, None]
    cos_a = np.sum(v * s.a, axis=1)
    z = (cos_a - b) / temperature
    data = float(np.mean(np.logaddexp(0.0, z) - s.y * z))
    dz = (np.exp(-np.logaddexp(0.0, -z)) - s.y) / n  # (sigmoid(z) - y) / n
    d_cos_a = dz / temperature
    grad_b = -float(np.sum(dz)) / temperature

    has_target = (s.y == 1.0) & (np.linalg.norm(c, axis=1) > 0.5)
    n_conf = max(int(has_target.sum()), 1)
    w = np.where(has_target, pull / n_conf, 0.0)
    cos_c = np.sum(v * c, axis=1)
    pull_loss = float(np.sum(w * (1.0 - cos_c)))
    d_cos_c = -w

    grad_u = (
        d_cos_a[:, None] * (s.a - cos_a[:, None] * v) + d_cos_c[:, None] * (c - cos_c[:, None] * v)
    ) / norms[:, None]
    diff = m - np.eye(m.shape[0])
    value = data + pull_loss + lam * float(np.sum(diff * diff))
    grad_m = grad_u.T @ s.q + 2.0 * lam * diff
    return value, grad_m, grad_b


def _fit_matrix(
    s: _Sample, lam: float, temperature: float, pull: float, steps: int, lr: float
) -> tuple[np.ndarray, float]:
    """Full-batch Adam from M = I with a linearly decaying step; identity without confirmed hits."""
    d = s.q.shape[1]
    m = np.eye(d)
    if s.q.shape[0] == 0 or not np.any(s.y == 1.0):
        return m, float("nan")
    c = _term_targets(s)
    b = float(np.mean(np.sum(s.q * s.a, axis=1)))
    mom_m, vel_m = np.zeros_like(m), np.zeros_like(m)
    mom_b, vel_b = 0.0, 0.0
    beta1, beta2, eps = 0.9, 0.999, 1e-8
    value = float("nan")
    for t in range(1, steps + 1):
        value, g_m, g_b = _objective(m, b, s, c, lam, temperature, pull)
        step = lr * (1.0 - 0.9 * (t - 1) / max(steps - 1, 1))
        mom_m = beta1 * mom_m + (1 - beta1) * g_m
        vel_m = beta2 * vel_m + (1 - beta2) * g_m * g_m
        mom_b = beta1 * mom_b + (1 - beta1) * g_b
        vel_b = beta2 * vel_b + (1 - beta2) * g_b * g_b
        corr1, corr2 = 1 - beta1**t, 1 - beta2**t
        m = m - step * (mom_m / corr1) / (np.sqrt(vel_m / corr2) + eps)
        b = b - step * (mom_b / corr1) / (math.sqrt(vel_b / corr2) + eps)
    value, _, _ = _objective(m, b, s, c, lam, temperature, pull)
    return m, value


def _subset(s: _Sample, mask: np.ndarray) -> _Sample:
    idx = np.nonzero(mask)[0]
    return _Sample(s.q[idx], s.a[idx], s.y[idx], tuple(s.terms[i] for i in idx))


def _cosines(m: np.ndarray, q: np.ndarray, a: np.ndarray) -> np.ndarray:
    u = q @ m.T
    return np.sum(u * a, axis=1) / np.maximum(np.linalg.norm(u, axis=1), _TINY)


def _cross_validate(
    s: _Sample, folds: int, seed: int, fit: dict[str, Any], background: np.ndarray | None = None,
    twv: tuple[list, list] | None = None,
) -> tuple[list[float], list[float]]:
    """Held-out AP per evaluable term, before and after, with folds dealt over terms.

    Without ``background``, a term's checked hits are ranked among themselves (terms with
    both verdicts); with it (unit rows of other archive windows), its confirmed hits are
    ranked among every other hit of the sample (rejected hits of any term, confirmed hits of
    other terms) and the background (terms with a confirmed hit), as a search ranks them.
    ``twv``: two lists that receive, per such term, before and after, the cosines to its
    confirmed hits, to the other hits and to the background (for evaluation.sampled_mtwv)."""
    unique = sorted(set(s.terms))
    order = np.random.default_rng(seed).permutation(len(unique))
    k = min(folds, len(unique))
    fold_of = {unique[j]: pos % k for pos, j in enumerate(order)}
    fold = np.array([fold_of[t] for t in s.terms])
    terms = np.array(s.terms, dtype=object)
    before: list[float] = []
    after: list[float] = []
    for f in range(k):
        m, _ = _fit_matrix(_subset(s, fold != f), **fit)
        for t in sorted(fold_of):
            if fold_of[t] != f:
                continue
            idx = np.nonzero(terms == t)[0]
            y = s.y[idx]
            if background is not None and y.any():
                q0 = s.q[idx[0]]
                q1 = m @ q0
                q1 = q1 / max(np.linalg.norm(q1), _TINY)
                own = (terms == t) & (s.y == 1)
                others = np.concatenate([s.a[~own], background])
                before.append(ranked_ap(s.a[own] @ q0, others @ q0))
                after.append(ranked_ap(s.a[own] @ q1, others @ q1))
                if twv is not None:
                    for out, qq in zip(twv, (q0, q1)):
                        out.append((s.a[own] @ qq, s.a[~own] @ qq, background @ qq))
                continue
            if y.all() or not y.any():
                continue  # AP is 1 or undefined whatever the map: no information
            before.append(average_precision(np.sum(s.q[idx] * s.a[idx], axis=1), y))
            after.append(average_precision(_cosines(m, s.q[idx], s.a[idx]), y))
    return before, after


def paired_gain_p(before: Sequence[float], after: Sequence[float]) -> float:
    """One-sided p-value that the mean of after - before is above 0 (Student's paired t-test);
    1.0 when there is no spread to test (fewer than two terms, or every gain equal and not positive)."""
    from scipy.stats import ttest_rel

    d = np.asarray(after, float) - np.asarray(before, float)
    if d.size < 2:
        return 1.0
    if np.all(d == d[0]):  # no spread: the t statistic is undefined
        return 0.0 if d[0] > 0 else 1.0
    return float(ttest_rel(after, before, alternative="greater").pvalue)


def fit_query_map(
    q: np.ndarray,
    a: np.ndarray,
    y: Sequence[Any],
    term_ids: Sequence[Any],
    lam: float = 0.03,
    folds: int = 5,
    seed: int = 0,
    *,
    min_gain: float = 0.0,
    significance: float | None = None,
    background: np.ndarray | None = None,
    total_seconds: float = 0.0,
    temperature: float = 0.1,
    pull: float = 1.0,
    steps: int = 300,
    lr: float = 0.01,
) -> tuple[QueryMap, dict[str, Any]]:
    """Fit a query map from checked hits; returns the map and its report (also ``map.report``).

    ``q``: (n, d) spelling embeddings of each hit's term; ``a``: (n, d) audio
    embeddings of the hits' windows; ``y``: verdicts (1 confirmed, 0 rejected);
    ``term_ids``: the term of each hit (compared as strings). Inputs are not
    modified. ``folds`` and ``seed`` set the cross-validation over terms. The
    data terms are means, so ``lam`` is a fixed strength relative to them; the
    default 0.03 kept the loss under 0.01 of held-out MAP on constructed samples
    without any mismatch while still undoing most of a rotation of the queries.
    ``background``: optional (m, d) vectors of other archive windows; the held-out check
    then ranks each term's confirmed hits among every other checked hit and these, as search does.
    ``total_seconds``: the archive's duration; with a background, the report then also holds the
    held-out MTWV estimate before and after (evaluation.sampled_mtwv; reported, not used to switch).
    """
    if lam < 0 or temperature <= 0 or pull < 0 or steps < 1 or lr <= 0:
        raise TrawlError("fit_query_map needs lam >= 0, pull >= 0, temperature > 0, steps >= 1, lr > 0")
    if folds < 2:
        raise TrawlError(f"cross-validation needs at least 2 folds, not {folds}")
    if min_gain < -MAX_TOLERATED_LOSS:
        raise TrawlError(
            f"min_gain {min_gain} would enable a map that loses more than "
            f"{MAX_TOLERATED_LOSS} of held-out MAP; use a value of at least {-MAX_TOLERATED_LOSS}"
        )
    s = _sample(q, a, y, term_ids)
    n, d = s.q.shape
    fit = {"lam": lam, "temperature": temperature, "pull": pull, "steps": steps, "lr": lr}
    report: dict[str, Any] = {
        "n_hits": n,
        "n_confirmed": int(s.y.sum()),
        "n_terms": len(set(s.terms)),
        "folds": min(folds, len(set(s.terms))),
        "seed": seed,
        "min_gain": min_gain,
        "significance": significance,
        **fit,
    }
    sample_hash = _sample_hash(q, a, y, term_ids)
    if n == 0:
        report.update(enabled=False, reason="no checked hits: the spelling encoder is used as it is",
                      before_map=None, after_map=None, gain=None, terms_evaluated=0)
        qm = QueryMap(np.eye(d), sample_hash=sample_hash, created=_now(), report=report)
        return qm, report
    if n < MIN_HITS:
        raise TrawlError(
            f"the checked sample has {n} checked hits; adapting the query side needs at least "
            f"{MIN_HITS} (check more hits by ear and fill in their verdicts)"
        )
    if report["n_terms"] < MIN_TERMS:
        raise TrawlError(
            f"the checked sample covers {report['n_terms']} term(s); adapting the query side "
            f"needs hits of at least {MIN_TERMS} different terms"
        )
    if report["n_confirmed"] == 0:
        raise TrawlError(
            "the checked sample has no confirmed hit; adapting the query side needs at least "
            "one hit marked 'yes'"
        )

    bg = None if background is None else _unit_rows(np.array(background, dtype=np.float64), "background")
    twv: tuple[list, list] | None = ([], []) if bg is not None and total_seconds > 0 else None
    before, after = _cross_validate(s, folds, seed, fit, bg, twv)
    if twv is not None and twv[0]:
        report["before_mtwv"] = sampled_mtwv(twv[0], total_seconds)[0]
        report["after_mtwv"] = sampled_mtwv(twv[1], total_seconds)[0]
    m, value = _fit_matrix(s, **fit)
    report["terms_evaluated"] = len(before)
    report["final_objective"] = value
    if before:
        before_map, after_map = float(np.mean(before)), float(np.mean(after))
        p = paired_gain_p(before, after) if significance is not None else None
        enabled = after_map >= before_map + min_gain and (p is None or p < significance)
        report.update(before_map=before_map, after_map=after_map, gain=after_map - before_map,
                      enabled=enabled, gain_p=p)
        report["reason"] = (
            f"held-out MAP {after_map:.3f} with the map is below {before_map:.3f} plus the required gain of {min_gain:.2f}"
            if after_map < before_map + min_gain
            else f"the held-out gain is not significant (one-sided paired t-test, p = {p:.2f})" if not enabled
            else "held-out MAP did not get worse" if min_gain <= 0 and p is None
            else f"held-out MAP improved by at least the required gain of {min_gain:.2f}" + ("" if p is None else f" (p = {p:.3f})")
        )
    else:
        report.update(before_map=None, after_map=None, gain=None, enabled=False,
                      reason="no held-out term has both confirmed and rejected hits, "
                             "so the map could not be checked")
    qm = QueryMap(m, sample_hash=sample_hash, created=_now(), report=report)
    return qm, report

"""Confidence: turn off-manifold signals into a calibrated probability that a frame is faithful.

"Faithful" is the outcome 1 (the frame's SSIM against the true view is at least tau). Raw signals
(columns, each oriented so that larger = worse: cycle residual, distance to the nearest bank code...)
go through ``SignalCombiner``, a small L2 logistic regression on standardised inputs whose score is
a log-odds (higher = more likely faithful); ``Calibrator`` then maps that score monotonically to a
probability (Platt scaling or isotonic regression). The calibrator must not see scores the combiner
was fitted on, or it learns the combiner's optimism: ``fit_confidence`` fits it on cross-fitted
(out-of-fold) scores, and measures ECE and AUROC on rows kept out of both. Pure numpy / scipy.
"""
from __future__ import annotations

from typing import Mapping, Sequence

import numpy as np
from scipy.special import betaincinv, expit, logit
from scipy.stats import rankdata

__all__ = ["BoundConfidence", "Calibrator", "ConfidenceModel", "SignalCombiner", "auroc", "combine_signals",
           "conservative_rate", "ece", "fit_confidence", "reliability_table"]


def _vector(x, name: str) -> np.ndarray:
    x = np.asarray(x, dtype=np.float64)
    if x.ndim != 1 or x.size == 0:
        raise ValueError(f"{name} must be a non-empty 1-D array, got shape {x.shape}")
    if not np.all(np.isfinite(x)):
        raise ValueError(f"{name} must be finite, got {x[~np.isfinite(x)][0]!r}")
    return x


def _outcome(outcome, n: int) -> np.ndarray:
    y = _vector(outcome, "outcome")
    if y.size != n:
        raise ValueError(f"outcome must have one entry per sample ({n}), got {y.size}")
    if not np.all((y == 0) | (y == 1)):
        raise ValueError(f"outcome must be 0 or 1, got {y[(y != 0) & (y != 1)][0]!r}")
    return y


def _bin_index(prob, outcome, bins: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    if int(bins) != bins or bins < 1:
        raise ValueError(f"bins must be an integer >= 1, got {bins!r}")
    p = _vector(prob, "prob")
    if p.min() < 0 or p.max() > 1:
        raise ValueError(f"prob must lie in [0, 1], got values in [{p.min():g}, {p.max():g}]")
    y = _outcome(outcome, p.size)
    edges = np.arange(int(bins) + 1) / bins  # exact i / bins, so p = i / bins opens bin i
    idx = np.clip(np.searchsorted(edges, p, side="right") - 1, 0, int(bins) - 1)
    return p, y, idx


def ece(prob, outcome, bins: int = 15) -> float:
    """Expected calibration error: sum_b (n_b / N) |mean(outcome_b) - mean(prob_b)|, in [0, 1].

    Bin i holds prob in [i / bins, (i + 1) / bins); the last bin also holds 1.0.
    """
    p, y, idx = _bin_index(prob, outcome, bins)
    count = np.bincount(idx, minlength=int(bins))
    gap = np.abs(np.bincount(idx, y, int(bins)) - np.bincount(idx, p, int(bins)))  # n_b * |gap_b|
    return float(gap.sum() / count.sum())


def reliability_table(prob, outcome, bins: int = 15) -> list[dict]:
    """One dict per bin (lo, hi, count, mean_prob, frequency); empty bins carry None for the means."""
    p, y, idx = _bin_index(prob, outcome, bins)
    masks = [idx == i for i in range(int(bins))]
    return [{"lo": i / bins, "hi": (i + 1) / bins, "count": int(m.sum()),
             "mean_prob": float(p[m].mean()) if m.any() else None,
             "frequency": float(y[m].mean()) if m.any() else None} for i, m in enumerate(masks)]


def auroc(score, label) -> float:
    """Area under the ROC curve (Mann-Whitney U / (n_pos n_neg), ties count 1/2); nan if a class is empty."""
    s = _vector(score, "score")
    y = _outcome(label, s.size).astype(bool)
    n_pos, n_neg = int(y.sum()), int((~y).sum())
    if n_pos == 0 or n_neg == 0:
        return float("nan")
    u = rankdata(s)[y].sum() - n_pos * (n_pos + 1) / 2
    return float(u / (n_pos * n_neg))


def _logistic(x: np.ndarray, y: np.ndarray, penalty: np.ndarray, *, max_iter: int = 100,
              tol: float = 1e-10) -> np.ndarray:
    """Minimise sum(log-loss) + 0.5 sum(penalty w^2) by damped Newton (IRLS); x carries a ones column."""
    def loss(w):
        z = x @ w
        return np.sum(np.logaddexp(0.0, z) - y * z) + 0.5 * np.sum(penalty * w * w)

    w = np.zeros(x.shape[1])
    f = loss(w)
    for _ in range(max_iter):
        p = expit(x @ w)
        grad = x.T @ (p - y) + penalty * w
        hess = (x * (p * (1 - p))[:, None]).T @ x + np.diag(penalty + 1e-12)  # jitter: saturated fits
        step = np.linalg.solve(hess, grad)
        t = 1.0
        while (f_new := loss(w - t * step)) > f and t > 1e-8:  # halve until the loss stops rising
            t /= 2
        if f_new > f:  # no descent left at float precision: w is the optimum
            break
        w, f_old, f = w - t * step, f, f_new
        if np.max(np.abs(t * step)) < tol or f_old - f < tol * max(1.0, abs(f)):
            break
    return w


def _require(d: Mapping, keys: Sequence[str], what: str) -> None:
    missing = [k for k in keys if k not in d]
    if missing:
        raise LookupError(f"{what} dict lacks the keys {missing}")


def _pav(y: np.ndarray, w: np.ndarray) -> np.ndarray:
    """Weighted pool-adjacent-violators: the non-decreasing fit to y; for scipy < 1.12."""
    means, weights, sizes = [], [], []
    for yi, wi in zip(y, w):
        means.append(yi), weights.append(wi), sizes.append(1)
        while len(means) > 1 and means[-2] > means[-1]:
            m, v, s = means.pop(), weights.pop(), sizes.pop()
            means[-1] = (means[-1] * weights[-1] + m * v) / (weights[-1] + v)
            weights[-1] += v
            sizes[-1] += s
    return np.repeat(means, sizes)


def _isotonic(y: np.ndarray, w: np.ndarray) -> np.ndarray:
    try:
        from scipy.optimize import isotonic_regression
    except ImportError:
        return _pav(y, w)
    return isotonic_regression(y, weights=w).x


class Calibrator:
    """Monotone map from a scalar signal (higher = more likely faithful) to a probability in (0, 1)."""

    METHODS = ("auto", "platt", "isotonic")

    def __init__(self):
        self.method: str | None = None
        self.params: dict = {}

    def fit(self, signal, outcome, *, method: str = "auto", min_isotonic: int = 200,
            min_class: int = 20, l2: float = 1e-2, prob_floor: float = 1e-3) -> "Calibrator":
        """Fit on 1-D signal and 0/1 outcome. "auto" takes isotonic with >= min_isotonic samples and
        >= min_class of each outcome, else Platt. l2 penalises the standardised Platt slope;
        probabilities are clipped to [prob_floor, 1 - prob_floor]."""
        if method not in self.METHODS:
            raise ValueError(f"method must be one of {self.METHODS}, got {method!r}")
        if not 0 < prob_floor < 0.5:
            raise ValueError(f"prob_floor must lie in (0, 0.5), got {prob_floor!r}")
        s = _vector(signal, "signal")
        y = _outcome(outcome, s.size)
        n_pos = int(y.sum())
        if method == "auto":
            enough = s.size >= min_isotonic and min(n_pos, s.size - n_pos) >= min_class
            method = "isotonic" if enough else "platt"
        self.method, self.params = method, {"prob_floor": float(prob_floor)}
        if method == "isotonic":
            xs, inverse, counts = np.unique(s, return_inverse=True, return_counts=True)
            ys = _isotonic(np.bincount(inverse, y) / counts, counts.astype(np.float64))
            # Interior points of a flat run add nothing to the interpolation; dropping them keeps JSON small.
            inner = (ys[1:-1] == ys[:-2]) & (ys[1:-1] == ys[2:])
            keep = np.r_[True, ~inner, True][:ys.size]
            self.params.update(x=xs[keep].tolist(), y=ys[keep].tolist())
            return self
        mu, sd = s.mean(), s.std()
        slope, intercept = 0.0, float(logit(np.clip(y.mean(), prob_floor, 1 - prob_floor)))
        if 0 < n_pos < s.size and sd > 0:
            z = (s - mu) / sd  # standardised so the slope penalty does not depend on signal units
            b, a = _logistic(np.c_[np.ones_like(z), z], y, np.array([0.0, l2]))
            if a > 0:  # the loss is convex, so a negative free slope means the optimum under a >= 0 is a = 0
                slope, intercept = float(a / sd), float(b - a * mu / sd)
        self.params.update(slope=slope, intercept=intercept)
        return self

    def predict(self, signal) -> np.ndarray:
        """Probability per signal value, same shape as signal."""
        if self.method is None:
            raise ValueError("Calibrator is not fitted; call fit() or from_dict() first")
        s = np.asarray(signal, dtype=np.float64)
        if np.any(np.isnan(s)):
            raise ValueError("signal must not contain NaN")
        if self.method == "isotonic":
            p = np.interp(s, self.params["x"], self.params["y"])  # clips to the end values outside
        else:
            a, b = self.params["slope"], self.params["intercept"]
            p = expit(a * s + b) if a > 0 else np.full(s.shape, expit(b))
        eps = self.params["prob_floor"]
        return np.clip(p, eps, 1 - eps)

    def to_dict(self) -> dict:
        if self.method is None:
            raise ValueError("Calibrator is not fitted; nothing to store")
        return {"method": self.method, **self.params}

    @classmethod
    def from_dict(cls, d: Mapping) -> "Calibrator":
        keys = {"platt": ("slope", "intercept", "prob_floor"), "isotonic": ("x", "y", "prob_floor")}
        if d.get("method") not in keys:
            raise ValueError(f"calibrator method must be 'platt' or 'isotonic', got {d.get('method')!r}")
        _require(d, keys[d["method"]], "calibrator")
        cal = cls()
        cal.method = d["method"]
        cal.params = {k: (list(map(float, d[k])) if k in ("x", "y") else float(d[k])) for k in keys[cal.method]}
        return cal


def _matrix(features, names: Sequence[str] | None = None) -> tuple[np.ndarray, tuple[str, ...]]:
    """Signals as an (N, K) float array; a mapping is read column by column in the order of names."""
    if isinstance(features, Mapping):
        names = tuple(features) if names is None else tuple(names)
        missing = [n for n in names if n not in features]
        if missing:
            raise LookupError(f"features lack the signals {missing}; expected {list(names)}")
        x = np.column_stack([np.asarray(features[n], dtype=np.float64) for n in names])
    else:
        x = np.asarray(features, dtype=np.float64)
        x = x[:, None] if x.ndim == 1 else x
    if x.ndim != 2 or x.size == 0:
        raise ValueError(f"features must be a non-empty (N, K) array, got shape {x.shape}")
    if not np.all(np.isfinite(x)):
        raise ValueError(f"features must be finite, got {x[~np.isfinite(x)][0]!r}")
    names = tuple(f"signal_{i}" for i in range(x.shape[1])) if names is None else tuple(names)
    if len(names) != x.shape[1]:
        raise ValueError(f"features have {x.shape[1]} columns but {len(names)} names: {list(names)}")
    return x, names


class SignalCombiner:
    """L2 logistic regression on standardised signals; ``score`` is the log-odds of a faithful frame."""

    def __init__(self):
        self.mean = self.scale = self.weights = None
        self.intercept = 0.0

    def fit(self, features, outcome, *, l2: float = 1.0) -> "SignalCombiner":
        """l2 penalises the weights of the standardised signals (sum log-loss + l2/2 |w|^2)."""
        if not (np.isfinite(l2) and l2 > 0):
            raise ValueError(f"l2 must be a finite number > 0, got {l2!r}")
        x, _ = _matrix(features)
        y = _outcome(outcome, x.shape[0])
        if y.min() == y.max():
            raise ValueError(f"outcome must contain both 0 and 1 to combine signals, got only {y[0]:g}")
        sd = x.std(axis=0)
        self.mean, self.scale = x.mean(axis=0), np.where(sd > 0, sd, 1.0)  # a constant column stays 0
        z = (x - self.mean) / self.scale  # (N, K)
        w = _logistic(np.c_[np.ones(len(z)), z], y, np.r_[0.0, np.full(z.shape[1], float(l2))])
        self.intercept, self.weights = float(w[0]), w[1:]
        return self

    def score(self, features) -> np.ndarray:
        """Combined score per row, shape (N,); higher = more likely faithful."""
        if self.weights is None:
            raise ValueError("SignalCombiner is not fitted; call fit() or from_dict() first")
        x, _ = _matrix(features)
        if x.shape[1] != self.weights.size:
            raise ValueError(f"features must have {self.weights.size} columns, got {x.shape[1]}")
        return self.intercept + ((x - self.mean) / self.scale) @ self.weights

    def to_dict(self) -> dict:
        if self.weights is None:
            raise ValueError("SignalCombiner is not fitted; nothing to store")
        return {"mean": self.mean.tolist(), "scale": self.scale.tolist(),
                "weights": self.weights.tolist(), "intercept": self.intercept}

    @classmethod
    def from_dict(cls, d: Mapping) -> "SignalCombiner":
        _require(d, ("mean", "scale", "weights", "intercept"), "combiner")
        c = cls()
        c.mean, c.scale, c.weights = (np.asarray(d[k], dtype=np.float64) for k in ("mean", "scale", "weights"))
        c.intercept = float(d["intercept"])
        return c


def combine_signals(features, outcome, *, l2: float = 1.0) -> SignalCombiner:
    """Fit a ``SignalCombiner`` on (N, K) signals and 0/1 outcomes."""
    return SignalCombiner().fit(features, outcome, l2=l2)


class ConfidenceModel:
    """Named raw signals -> combined score -> calibrated probability that a frame is faithful."""

    def __init__(self, names: Sequence[str], combiner: SignalCombiner, calibrator: Calibrator):
        self.names, self.combiner, self.calibrator = tuple(names), combiner, calibrator

    def predict(self, features) -> np.ndarray:
        """Probability per row, shape (N,); features are (N, K) in ``names`` order, or a name -> column map."""
        x, _ = _matrix(features, self.names if isinstance(features, Mapping) else None)
        return self.calibrator.predict(self.combiner.score(x))

    def to_dict(self) -> dict:
        return {"names": list(self.names), "combiner": self.combiner.to_dict(),
                "calibrator": self.calibrator.to_dict()}

    @classmethod
    def from_dict(cls, d: Mapping) -> "ConfidenceModel | BoundConfidence":
        """A fitted model, or the conservative bound stored when there was too little to fit."""
        if d.get("kind") == BoundConfidence.KIND:
            return BoundConfidence.from_dict(d)
        _require(d, ("names", "combiner", "calibrator"), "confidence")
        return cls(d["names"], SignalCombiner.from_dict(d["combiner"]), Calibrator.from_dict(d["calibrator"]))


def conservative_rate(successes: int, trials: int, *, level: float = 0.95) -> float:
    """A rate that the true faithful share exceeds with probability `level`: the lower end of the
    one-sided credible interval of a binomial rate under the Jeffreys prior Beta(1/2, 1/2), i.e. the
    (1 - level) quantile of Beta(k + 1/2, n - k + 1/2). 0.0 when nothing was faithful or nothing
    was seen: a frame is never given credit that the held-out frames did not earn."""
    k, n = int(successes), int(trials)
    if not 0 <= k <= n:
        raise ValueError(f"successes: {successes!r} is out of range; allowed 0 <= successes <= trials ({trials!r})")
    if not 0.5 <= level < 1.0:
        raise ValueError(f"level: {level!r} is out of range; allowed 0.5 <= level < 1")
    if k == 0:
        return 0.0
    return float(betaincinv(k + 0.5, n - k + 0.5, 1.0 - level))


class BoundConfidence:
    """The confidence of a model whose held-out frames were too few of one kind to fit a curve
    (for example none reached tau): every frame gets the same conservative rate, so a pipeline
    that rejects below min_confidence rejects them unless the held-out share earned better."""

    KIND = "bound"

    def __init__(self, names: Sequence[str], successes: int, trials: int, *, level: float = 0.95):
        self.names, self.successes, self.trials, self.level = tuple(names), int(successes), int(trials), level
        self.rate = conservative_rate(successes, trials, level=level)

    def predict(self, features) -> np.ndarray:
        x, _ = _matrix(features, self.names if isinstance(features, Mapping) else None)
        return np.full(x.shape[0], self.rate)

    def to_dict(self) -> dict:
        return {"kind": self.KIND, "names": list(self.names), "successes": self.successes, "trials": self.trials,
                "level": self.level, "rate": self.rate}

    @classmethod
    def from_dict(cls, d: Mapping) -> "BoundConfidence":
        _require(d, ("names", "successes", "trials", "level"), "confidence")
        return cls(d["names"], d["successes"], d["trials"], level=float(d["level"]))


def _cross_fit(x, y, names, rng, *, folds, l2, method, min_isotonic) -> ConfidenceModel:
    """Combiner on all rows; calibrator on out-of-fold combiner scores (stratified folds)."""
    fold = np.empty(y.size, dtype=int)
    for c in (0, 1):
        idx = rng.permutation(np.flatnonzero(y == c))
        fold[idx] = np.arange(idx.size) % folds
    oof = np.empty(y.size)
    for k in range(folds):
        out = fold == k
        if out.any():
            oof[out] = SignalCombiner().fit(x[~out], y[~out], l2=l2).score(x[out])
    calibrator = Calibrator().fit(oof, y, method=method, min_isotonic=min_isotonic)
    return ConfidenceModel(names, SignalCombiner().fit(x, y, l2=l2), calibrator)


def fit_confidence(features, outcome, *, names: Sequence[str] | None = None, seed: int = 0,
                   fit_share: float = 0.5, folds: int = 5, l2: float = 1.0, method: str = "auto",
                   min_isotonic: int = 200, bins: int = 15) -> tuple[ConfidenceModel, dict]:
    """Fit on a stratified fit_share of the rows, report ECE and AUROC on the rest, then refit on all
    rows for deployment. The report keeps the held-out metrics."""
    x, names = _matrix(features, names)
    y = _outcome(outcome, x.shape[0])
    if not 0 < fit_share < 1:
        raise ValueError(f"fit_share must lie in (0, 1), got {fit_share!r}")
    if int(folds) != folds or folds < 2:
        raise ValueError(f"folds must be an integer >= 2, got {folds!r}")
    counts = [int(np.sum(y == c)) for c in (0, 1)]
    if min(counts) < 3:  # each class needs 2 rows to cross-fit on the fit part and 1 to evaluate
        raise ValueError(f"outcome needs at least 3 rows of each class, got {counts[0]} zeros, {counts[1]} ones")
    rng = np.random.default_rng(seed)
    fit = np.zeros(y.size, dtype=bool)
    for c in (0, 1):
        idx = rng.permutation(np.flatnonzero(y == c))
        fit[idx[:int(np.clip(round(fit_share * idx.size), 2, idx.size - 1))]] = True
    kw = dict(folds=int(folds), l2=l2, method=method, min_isotonic=min_isotonic)
    held = _cross_fit(x[fit], y[fit], names, rng, **kw)
    prob, y_eval = held.predict(x[~fit]), y[~fit]
    report = {"n_fit": int(fit.sum()), "n_eval": int((~fit).sum()), "seed": seed, "fit_share": fit_share,
              "method": held.calibrator.method, "bins": int(bins), "ece": ece(prob, y_eval, bins),
              "auroc": auroc(prob, y_eval), "base_rate": float(y_eval.mean()),
              "reliability": reliability_table(prob, y_eval, bins)}
    model = _cross_fit(x, y, names, rng, **kw)
    report["deployed_method"] = model.calibrator.method
    return model, report

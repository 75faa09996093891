"""Joint two-sample tests for matched hardware / simulation sets.

Each hardware trial comes with its own K simulations at exactly the trial's parameters (a matched
set of K + 1 values). If the simulator tells the truth, the hardware point is one more draw from
the same distribution as its K simulations, so within each set the K + 1 points are exchangeable.
Both tests here use that, and nothing more:

- every set is standardised, feature by feature, by the mean and standard deviation of all of its
  K + 1 points (a symmetric function of the set, so it is unchanged when the labels are permuted
  within the set; this removes what the parameters do and keeps what the robot does differently);
- the null distribution comes from restricted permutations: in each set, one of its K + 1 points
  is drawn to play the hardware point (a permutation test with the matched design as strata).

Tests:

- :func:`mmd_matched_test`: the unbiased estimate MMD^2_u of Gretton et al. (2012), JMLR 13:723-773,
  eq. (3) (Lemma 6), Gaussian kernel whose width is the median pairwise distance of the pooled
  sample (the median heuristic, ibid. section 8), p-value from restricted permutations counted
  as (1 + #{permuted >= observed}) / (1 + P) (Phipson and Smyth 2010, so it is never 0).
- :func:`classifier_matched_test`: the classifier two-sample test of Lopez-Paz and Oquab (2017),
  ICLR. A linear discriminant (scikit-learn) is trained on all sets but one and scores the held-out
  set (leave-one-trial-out cross-validation). The statistic is the mean over held-out sets of the
  within-set AUC (the fraction of the set's simulations scored below its hardware point; ties count
  one half); its p-value comes from the same restricted permutations, refitting for every
  labelling (cheap: one multi-target least-squares fit per fold). The AUC interval is a percentile
  bootstrap over trials (scipy.stats.bootstrap). (Treating the held-out ranks as independent is not valid: each fold's
  classifier has seen the other folds' hardware labels, and the repeated-null check rejected about
  10% at level 0.05.)
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats
from sklearn.linear_model import Ridge

PERMUTATION_BLOCK = 200  # permutations evaluated per matrix product (bounds memory at P x N floats)


@dataclass
class MatchedSets:
    """Matched sets pooled into one sample.

    Attributes:
        points: ``(N x p)`` standardised features (dimensionless), sets one after another, the
            hardware point first in each set.
        starts: ``(n,)`` int, first row of each set in ``points``.
        sizes: ``(n,)`` int, rows of each set (its simulations + 1).
    """

    points: np.ndarray
    starts: np.ndarray
    sizes: np.ndarray

    @property
    def n_sets(self) -> int:
        return int(self.starts.shape[0])

    def hardware_mask(self) -> np.ndarray:
        mask = np.zeros(self.points.shape[0], dtype=bool)
        mask[self.starts] = True
        return mask

    def group(self) -> np.ndarray:
        return np.repeat(np.arange(self.n_sets), self.sizes)


def matched_sets(hardware: np.ndarray, simulated: np.ndarray) -> MatchedSets:
    """Standardise each matched set by its own mean and sd and pool the sets.

    Args:
        hardware: ``(n x p)`` hardware feature values, feature units. Trials with any NaN are dropped.
        simulated: ``(n x K x p)`` matched simulations, feature units; rows with any NaN (diverged
            or padding) are dropped from their set.

    A feature that is constant within a set is 0 there after standardisation (nothing to tell apart).
    """
    hardware = np.asarray(hardware, dtype=float)
    simulated = np.asarray(simulated, dtype=float)
    blocks, sizes = [], []
    for i in range(hardware.shape[0]):
        if not np.all(np.isfinite(hardware[i])):
            continue
        sims = simulated[i][np.all(np.isfinite(simulated[i]), axis=1)]
        if sims.shape[0] == 0:
            continue
        block = np.vstack([hardware[i][None, :], sims])
        mean = block.mean(axis=0)
        sd = block.std(axis=0)
        safe = np.where(sd > 0, sd, 1.0)
        blocks.append(np.where(sd > 0, (block - mean) / safe, 0.0))
        sizes.append(block.shape[0])
    if not blocks:
        return MatchedSets(np.empty((0, hardware.shape[1])), np.empty(0, int), np.empty(0, int))
    sizes_a = np.asarray(sizes, dtype=int)
    starts = np.concatenate([[0], np.cumsum(sizes_a)[:-1]]).astype(int)
    return MatchedSets(np.vstack(blocks), starts, sizes_a)


def median_heuristic(points: np.ndarray) -> float:
    """Median pairwise Euclidean distance of ``points (N x p)`` (Gretton et al. 2012, section 8).

    Returns 1.0 when every distance is zero, so the kernel stays defined.
    """
    sq = _squared_distances(points, points)
    upper = sq[np.triu_indices(points.shape[0], k=1)]
    width = float(np.sqrt(np.median(upper))) if upper.size else 0.0
    return width if width > 0 else 1.0


def _squared_distances(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    sq = (x * x).sum(1)[:, None] + (y * y).sum(1)[None, :] - 2.0 * x @ y.T
    return np.maximum(sq, 0.0)  # round-off can make a zero distance slightly negative


def gaussian_kernel(x: np.ndarray, y: np.ndarray, width: float) -> np.ndarray:
    """``k(x, y) = exp(-|x - y|^2 / (2 width^2))`` for ``x (m x p)``, ``y (n x p)``; returns ``(m x n)``."""
    return np.exp(-_squared_distances(x, y) / (2.0 * width * width))


def mmd2_unbiased(x: np.ndarray, y: np.ndarray, width: float) -> float:
    """Unbiased MMD^2_u of Gretton et al. (2012), eq. (3), Gaussian kernel of the given width.

    ``1/(m(m-1)) sum_{i!=j} k(x_i,x_j) + 1/(n(n-1)) sum_{i!=j} k(y_i,y_j) - 2/(mn) sum_{i,j} k(x_i,y_j)``
    for ``x (m x p)``, ``y (n x p)``, m, n >= 2. It can be negative (it is unbiased, not a square).
    """
    m, n = x.shape[0], y.shape[0]
    if m < 2 or n < 2:
        raise ValueError(f"MMD^2_u needs at least 2 points per sample, got {m} and {n}")
    kxx, kyy, kxy = gaussian_kernel(x, x, width), gaussian_kernel(y, y, width), gaussian_kernel(x, y, width)
    return float(
        (kxx.sum() - np.trace(kxx)) / (m * (m - 1))
        + (kyy.sum() - np.trace(kyy)) / (n * (n - 1))
        - 2.0 * kxy.sum() / (m * n)
    )


@dataclass
class MMDResult:
    mmd2: float  # unbiased MMD^2_u, dimensionless
    width: float  # Gaussian kernel width (median heuristic), standardised units
    p_value: float
    permutations: int
    n_hardware: int
    n_simulated: int


def _mmd2_from_indicators(kernel: np.ndarray, indicators: np.ndarray, m: int) -> np.ndarray:
    """MMD^2_u for each row of ``indicators (P x N)`` (1 marks the m points of the first sample)."""
    n_total = kernel.shape[0]
    n_other = n_total - m
    row_sums = kernel.sum(axis=1)
    total = row_sums.sum()
    diag = np.diag(kernel)
    a_k_a = np.einsum("pi,pi->p", indicators @ kernel, indicators)
    a_k_1 = indicators @ row_sums
    a_diag = indicators @ diag
    xx = a_k_a - a_diag
    xy = a_k_1 - a_k_a
    yy = total - 2.0 * a_k_1 + a_k_a - (diag.sum() - a_diag)
    return xx / (m * (m - 1)) + yy / (n_other * (n_other - 1)) - 2.0 * xy / (m * n_other)


def _restricted_draws(sets: MatchedSets, count: int, rng: np.random.Generator) -> np.ndarray:
    """``(count x n)`` row indices: in each set, the point drawn to play the hardware point."""
    offsets = np.floor(rng.random((count, sets.n_sets)) * sets.sizes[None, :]).astype(int)
    return sets.starts[None, :] + np.minimum(offsets, sets.sizes[None, :] - 1)


def mmd_matched_test(
    hardware: np.ndarray, simulated: np.ndarray, *, permutations: int, rng: np.random.Generator
) -> MMDResult:
    """MMD^2_u permutation test of hardware against matched simulations (see the module docstring).

    Args:
        hardware: ``(n x p)`` hardware features, feature units.
        simulated: ``(n x K x p)`` matched simulations, feature units (NaN rows ignored).
        permutations: number of restricted permutations P.
        rng: source of the permutations.
    """
    sets = matched_sets(hardware, simulated)
    m = sets.n_sets
    n_total = sets.points.shape[0]
    if m < 2 or n_total - m < 2:
        return MMDResult(float("nan"), float("nan"), float("nan"), 0, m, n_total - m)
    width = median_heuristic(sets.points)
    kernel = gaussian_kernel(sets.points, sets.points, width)
    observed_ind = sets.hardware_mask().astype(float)[None, :]
    observed = float(_mmd2_from_indicators(kernel, observed_ind, m)[0])
    exceed = 0
    done = 0
    while done < permutations:
        count = min(PERMUTATION_BLOCK, permutations - done)
        rows = _restricted_draws(sets, count, rng)
        ind = np.zeros((count, n_total))
        ind[np.arange(count)[:, None], rows] = 1.0
        # a tiny tolerance so that the observed labelling, when drawn, counts as "at least as large"
        exceed += int(np.sum(_mmd2_from_indicators(kernel, ind, m) >= observed - 1e-12))
        done += count
    return MMDResult(observed, width, (1 + exceed) / (1 + permutations), permutations, m, n_total - m)


@dataclass
class ClassifierResult:
    auc: float  # mean within-set AUC of the held-out hardware point against its simulations
    auc_interval: tuple[float, float]  # percentile bootstrap over trials at the stated level
    p_value: float  # one-sided (hardware points score higher), restricted permutations
    permutations: int
    set_aucs: list[float]
    classifier: str
    cross_validation: str
    class_balance: str


def _labels(sets: MatchedSets, rows: np.ndarray) -> np.ndarray:
    """``(N x C)`` 0/1 targets, one column per labelling given by ``rows (C x n)``."""
    labels = np.zeros((sets.points.shape[0], rows.shape[0]))
    labels[rows.T, np.arange(rows.shape[0])[None, :]] = 1.0
    return labels


def classifier_matched_test(
    hardware: np.ndarray,
    simulated: np.ndarray,
    *,
    rng: np.random.Generator,
    permutations: int = 1000,
    level: float = 0.05,
    bootstrap: int = 2000,
    ridge: float = 1.0,
) -> ClassifierResult:
    """Classifier two-sample test (Lopez-Paz and Oquab 2017), leave-one-trial-out, permutation p-value.

    The classifier is the least-squares (ridge) linear discriminant, fitted with scikit-learn's
    ``Ridge`` on 0/1 targets. Its direction is Fisher's discriminant direction whatever the coding
    of the two classes (Hastie, Tibshirani and Friedman 2009, exercise 4.2), and the AUC does not
    depend on a threshold, so one hardware point against K simulations needs neither subsampling
    nor class weights. Because only the targets change between labellings, one multi-target fit
    per fold scores the observed labelling and all P restricted permutations at once, so the
    p-value is an exact permutation p-value, (1 + #{permuted >= observed}) / (1 + P).

    Args:
        hardware: ``(n x p)`` hardware features, feature units; needs n >= 3 usable trials.
        simulated: ``(n x K x p)`` matched simulations, feature units (NaN rows ignored).
        rng: source of the permutations and the bootstrap.
        permutations: number of restricted permutations P.
        level: the AUC interval has coverage 1 - level.
        bootstrap: bootstrap resamples for the interval.
        ridge: the ridge penalty (standardised units).
    """
    sets = matched_sets(hardware, simulated)
    n = sets.n_sets
    names = dict(
        classifier=f"least-squares linear discriminant (scikit-learn Ridge, alpha={ridge:g})",
        cross_validation="leave one trial (matched set) out",
        class_balance="none needed: the discriminant direction does not depend on the class coding "
        "and AUC has no threshold",
    )
    if n < 3:
        return ClassifierResult(float("nan"), (float("nan"), float("nan")), float("nan"), 0, [], **names)
    rows = np.vstack([sets.starts[None, :], _restricted_draws(sets, permutations, rng)])  # (C x n)
    labels = _labels(sets, rows)
    group = sets.group()
    aucs = np.empty((n, rows.shape[0]))
    for g in range(n):
        test = group == g
        model = Ridge(alpha=ridge).fit(sets.points[~test], labels[~test])
        scores = np.atleast_2d(model.predict(sets.points[test]))  # (K_g + 1) x C
        if scores.shape[0] != int(test.sum()):
            scores = scores.T
        hw_scores = scores[rows[:, g] - sets.starts[g], np.arange(rows.shape[0])]
        below = np.sum(scores < hw_scores[None, :], axis=0)
        ties = np.sum(scores == hw_scores[None, :], axis=0) - 1
        aucs[g] = (below + 0.5 * ties) / (sets.sizes[g] - 1)
    statistic = aucs.mean(axis=0)
    auc = float(statistic[0])
    p_value = (1 + int(np.sum(statistic[1:] >= auc - 1e-12))) / (1 + permutations)
    observed = aucs[:, 0]
    boot = stats.bootstrap(
        (observed,), np.mean, n_resamples=bootstrap, confidence_level=1 - level, method="percentile", rng=rng
    )
    interval = (float(boot.confidence_interval.low), float(boot.confidence_interval.high))
    return ClassifierResult(auc, interval, p_value, permutations, [float(a) for a in observed], **names)

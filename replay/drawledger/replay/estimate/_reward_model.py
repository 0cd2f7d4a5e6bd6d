"""The doubly robust estimator's reward model: cross-fitted ridge regression per action."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike

from drawledger.exceptions import ReplayError
from drawledger.replay.estimate._estimators import Array, as_floats


def _design(x: Array) -> Array:
    return np.hstack([np.ones((x.shape[0], 1)), x])


@dataclass(frozen=True)
class RidgeStats:
    """Gram matrices and cross-products of [1, x] per (fold, action), combinable by addition."""

    gram: Array  # (folds, actions, p + 1, p + 1)
    xr: Array  # (folds, actions, p + 1)

    @classmethod
    def of(
        cls, x: ArrayLike, action: ArrayLike, r: ArrayLike, fold: ArrayLike, *, folds: int,
        actions: int,
    ) -> RidgeStats:  # fmt: skip
        xs = as_floats(x, "features")
        if xs.ndim != 2:
            raise ReplayError("features must be a 2-d matrix")
        rs = as_floats(r, "rewards")
        a = np.asarray(action, dtype=np.int64)
        f = np.asarray(fold, dtype=np.int64)
        if not (a.shape == f.shape == rs.shape == (xs.shape[0],)):
            raise ReplayError("features, actions, rewards and folds must have one row per record")
        if a.size and (a.min() < 0 or a.max() >= actions or f.min() < 0 or f.max() >= folds):
            raise ReplayError("action or fold index out of range")
        phi = _design(xs)
        p = phi.shape[1]
        gram = np.zeros((folds, actions, p, p))
        xr = np.zeros((folds, actions, p))
        key = f * actions + a
        order = np.argsort(key, kind="stable")
        keys, starts = np.unique(key[order], return_index=True)
        ends = np.append(starts[1:], order.size)
        for k, s, e in zip(keys, starts, ends, strict=True):
            rows = order[s:e]
            block = phi[rows]
            gram[k // actions, k % actions] = block.T @ block
            xr[k // actions, k % actions] = block.T @ rs[rows]
        return cls(gram, xr)

    def __add__(self, other: RidgeStats) -> RidgeStats:
        return RidgeStats(self.gram + other.gram, self.xr + other.xr)

    def fit(self, ridge: float = 1.0) -> RewardModel:
        """Per fold, a ridge regression per action fitted on the other folds.

        Rewards are centred on the training folds' mean and every coefficient (intercept
        included) is shrunk, so an action never logged in training predicts that mean.
        """
        if not ridge > 0.0:
            raise ReplayError(f"the ridge penalty must be > 0, got {ridge!r}")
        folds, actions, p, _ = self.gram.shape
        total_g = self.gram.sum(axis=0)
        total_b = self.xr.sum(axis=0)
        coef = np.zeros((folds, actions, p))
        base = np.zeros(folds)
        eye = np.eye(p) * ridge
        for f in range(folds):
            g = total_g - self.gram[f] if folds > 1 else total_g
            b = total_b - self.xr[f] if folds > 1 else total_b
            count = g[:, 0, 0].sum()
            base[f] = b[:, 0].sum() / count if count > 0 else 0.0
            centred = b - base[f] * g[:, :, 0]
            coef[f] = np.linalg.solve(g + eye, centred[..., None])[..., 0]
        return RewardModel(coef, base)


@dataclass(frozen=True)
class RewardModel:
    """Cross-fitted predictions q(x, a) = [1, x] . coef[fold, a] + base[fold]."""

    coef: Array  # (folds, actions, p + 1)
    base: Array  # (folds,)

    def predict(self, x: ArrayLike, fold: ArrayLike) -> Array:
        """Predicted reward of every action for each record, shape (n, actions)."""
        phi = _design(as_floats(x, "features"))
        f = np.asarray(fold, dtype=np.int64)
        out = np.empty((phi.shape[0], self.coef.shape[1]))
        for k in range(self.coef.shape[0]):
            rows = f == k
            out[rows] = phi[rows] @ self.coef[k].T + self.base[k]
        return out


def dr_terms(
    q: ArrayLike, target: ArrayLike, action: ArrayLike, w: ArrayLike, r: ArrayLike,
    reward_range: tuple[float, float] | None = None,
) -> Array:  # fmt: skip
    """sum_a pi(a|x) q(x, a) + w (r - q(x, a_logged)) per record (Dudik, Langford & Li 2011).

    ``q`` and ``target`` are (n, actions); predictions are clipped into ``reward_range``.
    """
    qa = as_floats(q, "reward predictions")
    if reward_range is not None:
        qa = np.clip(qa, reward_range[0], reward_range[1])
    pi = as_floats(target, "target probabilities")
    a = np.asarray(action, dtype=np.int64)
    logged = qa[np.arange(a.size), a]
    return (pi * qa).sum(axis=1) + as_floats(w, "weights") * (as_floats(r, "rewards") - logged)

"""A compact histogram gradient-boosting trainer for binary classification.

Used by the examples to show that a shared cut table serves training.  It is
deliberately small and written from the standard second-order boosting
math (Chen & Guestrin, KDD 2016, section 2):

* logistic loss on margins ``m``: with ``p = 1 / (1 + exp(-m))`` each row has
  gradient ``g = w (p - y)`` and hessian ``h = w p (1 - p)`` (``w`` the sample
  weight);
* trees are grown level-wise to a fixed depth; every node's histogram of
  ``G`` and ``H`` per feature and bin is one ``np.bincount`` over
  ``node * stride + code``;
* a split sends codes ``<= t`` left; the missing bin goes to whichever side
  gives the larger gain ``GL^2/(HL+lambda) + GR^2/(HR+lambda) - G^2/(H+lambda)``
  (halved, eq. 7 of the paper), and both children need a hessian sum of at
  least ``min_child_hess``;
* leaf values are ``-G / (H + lambda)`` times the learning rate (eq. 5).

Inputs are bin codes (``uint8``/``uint16``, shape ``(rows, features)``) with
the cut-table convention: feature ``j`` has ``n_edges[j]`` bins and code
``n_edges[j]`` means missing.  Nothing here knows where the edges came from,
so the same trainer runs on shared cuts and on exact reference cuts.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

__all__ = ["Booster", "BoostParams", "FeatureMajorCodes", "accuracy", "log_loss", "sigmoid",
           "train"]


@dataclass(frozen=True)
class BoostParams:
    """Training settings."""

    rounds: int = 100
    depth: int = 6
    learning_rate: float = 0.2
    l2: float = 1.0               # lambda in the leaf value and the gain
    min_child_hess: float = 1.0   # smallest hessian sum of a child
    min_gain: float = 0.0         # gamma: a split must gain more than this


@dataclass(frozen=True)
class FeatureMajorCodes:
    """Codes laid out one contiguous row of codes per feature, missing moved to ``stride - 1``.

    A common stride for all features lets one reshape turn every bincount
    into a ``(nodes, stride)`` histogram; moving the missing code of every
    feature to the last slot lets the split search treat it uniformly.
    """

    codes: np.ndarray      # (features, rows), uint8 or uint16
    n_edges: np.ndarray    # (features,)
    stride: int            # max(n_edges) + 1

    @classmethod
    def from_codes(cls, codes: np.ndarray, n_edges, stride: int | None = None) -> "FeatureMajorCodes":
        codes = np.asarray(codes)
        n_edges = np.asarray(n_edges, dtype=np.int64)
        if codes.ndim != 2 or codes.shape[1] != n_edges.size:
            raise ValueError(f"codes: expected shape (rows, {n_edges.size}), got {codes.shape}")
        stride = int(n_edges.max(initial=0) + 1) if stride is None else int(stride)
        dtype = np.uint8 if stride <= 256 else np.uint16
        fm = np.ascontiguousarray(codes.T, dtype=dtype)
        for j, k in enumerate(n_edges):
            if k + 1 != stride:
                row = fm[j]
                row[row == k] = stride - 1
        return cls(fm, n_edges, stride)

    @property
    def rows(self) -> int:
        return self.codes.shape[1]


@dataclass(frozen=True)
class _Tree:
    feature: tuple       # per level: (2**d,) int32, -1 = no split (rows go left)
    threshold: tuple     # per level: (2**d,) int32, codes <= t go left
    missing_left: tuple  # per level: (2**d,) bool
    leaf: np.ndarray     # (2**depth,) leaf values, learning rate applied


def _route(tree: _Tree, x: FeatureMajorCodes) -> np.ndarray:
    n = x.rows
    node = np.zeros(n, dtype=np.intp)
    rows = np.arange(n)
    miss = x.stride - 1
    for feat, thr, mleft in zip(tree.feature, tree.threshold, tree.missing_left):
        f = feat[node]
        split = f >= 0
        code = x.codes[np.where(split, f, 0), rows]
        right = (code > thr[node]) & split
        right &= ~((code == miss) & mleft[node])
        node = 2 * node + right
    return node


def sigmoid(m: np.ndarray) -> np.ndarray:
    """1 / (1 + exp(-m)) without overflow."""
    return 0.5 * (1.0 + np.tanh(0.5 * m))


@dataclass
class Booster:
    """A trained model: a base margin plus trees."""

    base_margin: float
    params: BoostParams
    trees: list = field(default_factory=list)

    def margin(self, x: FeatureMajorCodes, init: np.ndarray | None = None) -> np.ndarray:
        m = np.full(x.rows, self.base_margin) if init is None else np.array(init, dtype=np.float64)
        for t in self.trees:
            m += t.leaf[_route(t, x)]
        return m

    def predict(self, x: FeatureMajorCodes, init: np.ndarray | None = None) -> np.ndarray:
        """Probabilities."""
        return sigmoid(self.margin(x, init))


def _ratio(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """a / b, 0 where b <= 0 (an empty node)."""
    return np.divide(a, b, out=np.zeros(np.broadcast(a, b).shape), where=b > 0)


def _score(G: np.ndarray, H: np.ndarray, lam: float) -> np.ndarray:
    """G^2 / (H + lambda), the structure score of a node (eq. 6 of the paper, up to sign and 1/2)."""
    return _ratio(G * G, H + lam)


def _grow(x: FeatureMajorCodes, g: np.ndarray, h: np.ndarray, p: BoostParams):
    """One tree; returns it and the leaf index of every training row."""
    F, B = x.codes.shape[0], x.stride
    lam, mch = p.l2, p.min_child_hess
    node = np.zeros(x.rows, dtype=np.intp)
    rows = np.arange(x.rows)
    feats, thrs, mlefts = [], [], []
    for d in range(p.depth):
        nodes = 1 << d
        hg = np.empty((F, nodes, B))
        hh = np.empty((F, nodes, B))
        base = node * B
        for j in range(F):
            key = base + x.codes[j]
            hg[j] = np.bincount(key, weights=g, minlength=nodes * B).reshape(nodes, B)
            hh[j] = np.bincount(key, weights=h, minlength=nodes * B).reshape(nodes, B)
        G = hg[0].sum(axis=1)                       # (nodes,), the same for every feature
        H = hh[0].sum(axis=1)
        gm, hm = hg[:, :, -1:], hh[:, :, -1:]         # missing bin
        gl = np.cumsum(hg[:, :, :-1], axis=2)         # codes <= t, missing excluded
        hl = np.cumsum(hh[:, :, :-1], axis=2)
        parent = _score(G, H, lam)
        gains = []
        for GL, HL in ((gl, hl), (gl + gm, hl + hm)):  # missing right, missing left
            GR, HR = G[None, :, None] - GL, H[None, :, None] - HL
            gain = 0.5 * (_score(GL, HL, lam) + _score(GR, HR, lam) - parent[None, :, None])
            # a child needs some hessian (and a positive denominator when lambda is 0)
            gain[(HL < mch) | (HR < mch) | (HL + lam <= 0) | (HR + lam <= 0)] = -np.inf
            gains.append(gain)
        # (nodes, 2, F, B-1): best over direction, feature and threshold per node
        allg = np.stack(gains).transpose(2, 0, 1, 3).reshape(nodes, -1)
        best = np.argmax(allg, axis=1)
        bestgain = allg[np.arange(nodes), best]
        direction, rest = np.divmod(best, F * (B - 1))
        feat, thr = np.divmod(rest, B - 1)
        ok = bestgain > p.min_gain
        feat = np.where(ok, feat, -1).astype(np.int32)
        thr = thr.astype(np.int32)
        mleft = direction.astype(bool) & ok
        feats.append(feat), thrs.append(thr), mlefts.append(mleft)
        if not ok.any():
            # nothing left to split: keep the remaining levels as pass-through
            for dd in range(d + 1, p.depth):
                feats.append(np.full(1 << dd, -1, np.int32))
                thrs.append(np.zeros(1 << dd, np.int32))
                mlefts.append(np.zeros(1 << dd, bool))
            node = node << (p.depth - d)
            break
        f = feat[node]
        split = f >= 0
        code = x.codes[np.where(split, f, 0), rows]
        right = (code > thr[node]) & split
        right &= ~((code == B - 1) & mleft[node])
        node = 2 * node + right
    leaves = 1 << p.depth
    G = np.bincount(node, weights=g, minlength=leaves)
    H = np.bincount(node, weights=h, minlength=leaves)
    leaf = -_ratio(G, H + lam) * p.learning_rate
    return _Tree(tuple(feats), tuple(thrs), tuple(mlefts), leaf), node


def log_loss(y: np.ndarray, prob: np.ndarray, w: np.ndarray | None = None) -> float:
    """Mean negative log-likelihood (probabilities clipped to [1e-15, 1 - 1e-15])."""
    q = np.clip(prob, 1e-15, 1 - 1e-15)
    ll = -(y * np.log(q) + (1 - y) * np.log1p(-q))
    return float(np.average(ll, weights=w))


def accuracy(y: np.ndarray, prob: np.ndarray, w: np.ndarray | None = None) -> float:
    """Share of rows whose thresholded prediction (p > 0.5) equals the label."""
    return float(np.average((prob > 0.5) == y.astype(bool), weights=w))


def train(x: FeatureMajorCodes, y: np.ndarray, w: np.ndarray | None = None,
          params: BoostParams = BoostParams(), init_margin: np.ndarray | None = None,
          base_margin: float | None = None) -> tuple[Booster, np.ndarray]:
    """Fit trees on bin codes; return the booster and the final training margins.

    ``init_margin`` continues from earlier margins (another model's output);
    without it training starts from ``base_margin``, by default the log-odds
    of the weighted label mean (common practice).
    """
    y = np.asarray(y, dtype=np.float64)
    w = np.ones_like(y) if w is None else np.asarray(w, dtype=np.float64)
    if base_margin is None:
        mean = float(np.clip(np.average(y, weights=w), 1e-6, 1 - 1e-6))
        base_margin = float(np.log(mean / (1 - mean))) if init_margin is None else 0.0
    m = np.full(y.size, base_margin) if init_margin is None else np.array(init_margin, np.float64)
    model = Booster(base_margin, params)
    for _ in range(params.rounds):
        prob = sigmoid(m)
        g = w * (prob - y)
        h = w * prob * (1.0 - prob)
        tree, leaf_of_row = _grow(x, g, h, params)
        model.trees.append(tree)
        m += tree.leaf[leaf_of_row]
    return model, m

"""Score stage: cross-fit the proxy and give every training row its difficulty statistics.

Definitions (DESIGN.md; z_t logits at checkpoint t of a model that trained on the row,
p_t = softmax(z_t), y the label, correct_t = [argmax p_t = y]):

- ``forgetting``: count of t > 1 with correct_{t-1} = 1 and correct_t = 0, summed over the
  models that trained on the row (Toneva et al., ICLR 2019). A row never correct at any
  checkpoint is "never learned" and gets the number of checkpoints it was seen at, more than
  any row that was learned can reach, so it ranks as most forgettable.
- ``aum``: mean of z_t[y] - max_{k != y} z_t[k] (Pleiss et al., NeurIPS 2020).
- ``el2n``: ||p_e - onehot(y)||_2 at the early checkpoint e, averaged over models
  (Paul, Ganguli, Dziugaite, NeurIPS 2021).
- ``confidence``, ``variability``, ``correctness``: mean and population standard deviation of
  p_t[y], and mean of correct_t (Swayamdipta et al., EMNLP 2020).
- ``aleatoric``: mean of p_t[y] (1 - p_t[y]) (Seedat et al., NeurIPS 2022).
- ``oof_loss``, ``oof_margin``: -log p[y] and p[y] - max_{k != y} p[k] from the fold model that
  never saw the row.

Statistics are accumulated checkpoint by checkpoint in row chunks; no rows x checkpoints array exists.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from .config import Config, SCORE_NAMES
from .proxy import FittedProxy, fit_proxy, n_checkpoints, softmax
from .table import RowFrame

CHUNK = 65_536
#: Sign that turns each score into a difficulty (higher = harder).
DIFFICULTY_SIGN = {
    "forgetting": 1.0, "aum": -1.0, "el2n": 1.0, "confidence": -1.0, "variability": 1.0,
    "correctness": -1.0, "aleatoric": 1.0, "oof_loss": 1.0, "oof_margin": -1.0,
}


def _other_max(values: np.ndarray, y: np.ndarray) -> np.ndarray:
    masked = values.copy()
    masked[np.arange(len(y)), y] = -np.inf
    return masked.max(axis=1)


def margin(values: np.ndarray, y: np.ndarray) -> np.ndarray:
    """values[y] - max over the other classes, per row; values is (n, k)."""
    return values[np.arange(len(y)), y] - _other_max(values, y)


class Dynamics:
    """Running per-row statistics of a proxy's checkpoints.

    Parameters
    ----------
    n : int
        Number of rows.
    el2n_checkpoint : int
        The (1-based) checkpoint at which EL2N is taken.
    """

    def __init__(self, n: int, el2n_checkpoint: int):
        self.el2n_checkpoint = el2n_checkpoint
        self.count = np.zeros(n, np.int64)
        self.forgetting = np.zeros(n, np.int64)
        self.ever_correct = np.zeros(n, bool)
        self.prev_correct = np.zeros(n, np.int8)  # -1: no previous checkpoint in this model
        self.margin_sum = np.zeros(n)
        self.correct_sum = np.zeros(n)
        self.aleatoric_sum = np.zeros(n)
        self.p_mean = np.zeros(n)
        self.p_m2 = np.zeros(n)
        self.el2n_sum = np.zeros(n)
        self.el2n_count = np.zeros(n, np.int64)

    def start_model(self, rows: np.ndarray) -> None:
        """Mark the start of a new model's checkpoints for ``rows``."""
        self.prev_correct[rows] = -1

    def update(self, t: int, rows: np.ndarray, logits: np.ndarray, y: np.ndarray) -> None:
        """Fold in checkpoint ``t`` (1-based) for ``rows``; ``logits`` is (len(rows), k), ``y`` their labels."""
        for s in range(0, len(rows), CHUNK):
            self._update(t, rows[s:s + CHUNK], logits[s:s + CHUNK], y[s:s + CHUNK])

    def _update(self, t, rows, z, y):
        idx = np.arange(len(y))
        p = softmax(np.asarray(z, dtype=np.float64))
        py = p[idx, y]
        correct = z[idx, y] > _other_max(z, y)
        prev = self.prev_correct[rows]
        self.forgetting[rows] += (prev == 1) & ~correct
        self.prev_correct[rows] = correct
        self.ever_correct[rows] |= correct
        self.margin_sum[rows] += margin(np.asarray(z, dtype=np.float64), y)
        self.correct_sum[rows] += correct
        self.aleatoric_sum[rows] += py * (1.0 - py)
        n = self.count[rows] + 1
        delta = py - self.p_mean[rows]
        mean = self.p_mean[rows] + delta / n
        self.p_m2[rows] += delta * (py - mean)
        self.p_mean[rows] = mean
        self.count[rows] = n
        if t == self.el2n_checkpoint:
            p[idx, y] -= 1.0
            self.el2n_sum[rows] += np.sqrt(np.einsum("ij,ij->i", p, p))
            self.el2n_count[rows] += 1

    def result(self, rows: np.ndarray) -> dict[str, np.ndarray]:
        """The finished statistics of ``rows``."""
        c = self.count[rows].astype(np.float64)
        forgetting = np.where(self.ever_correct[rows], self.forgetting[rows], self.count[rows]).astype(np.float64)
        return {
            "forgetting": forgetting,
            "aum": self.margin_sum[rows] / c,
            "el2n": self.el2n_sum[rows] / np.maximum(self.el2n_count[rows], 1),
            "confidence": self.p_mean[rows],
            "variability": np.sqrt(self.p_m2[rows] / c),
            "correctness": self.correct_sum[rows] / c,
            "aleatoric": self.aleatoric_sum[rows] / c,
            "never_learned": ~self.ever_correct[rows],
        }


@dataclass
class Scores:
    """Per-row scores of the training rows.

    Attributes
    ----------
    table : pandas.DataFrame
        One row per training row, in ``frame.train`` order: a column per score in
        ``SCORE_NAMES`` plus ``never_learned``.
    proxies : list of FittedProxy
        The fold models, in fold order.
    checkpoints : int
        Checkpoints per fold model.
    """

    table: pd.DataFrame
    proxies: list[FittedProxy]
    checkpoints: int

    def difficulty(self, name: str) -> np.ndarray:
        """Score ``name`` oriented so that higher means harder."""
        return DIFFICULTY_SIGN[name] * self.table[name].to_numpy(np.float64)


def score(frame: RowFrame, config: Config) -> Scores:
    """Cross-fit the proxy over the folds of ``frame`` and score every training row.

    Returns
    -------
    Scores
    """
    pc = config.proxy
    train = frame.train
    y = frame.y[train]
    fold = frame.fold[train]
    X = frame.X[train]
    n_classes = len(frame.classes)
    T = n_checkpoints(pc)
    dyn = Dynamics(len(train), el2n_checkpoint=max(1, int(round(pc.el2n_at * T))))
    oof = np.empty((len(train), n_classes))
    proxies = []
    for k in range(pc.folds):
        fit_rows = np.flatnonzero(fold != k)
        out_rows = np.flatnonzero(fold == k)
        dyn.start_model(fit_rows)
        model = fit_proxy(X[fit_rows], y[fit_rows], n_classes, frame.categorical, pc, config.seed + k,
                          lambda t, z: dyn.update(t, fit_rows, z, y[fit_rows]))
        oof[out_rows] = model.predict_proba(X[out_rows])
        proxies.append(model)
    # clip as sklearn.metrics.log_loss does (float64 eps), so oof_loss averages to its value
    p_true = np.clip(oof[np.arange(len(y)), y], np.finfo(np.float64).eps, 1.0)
    table = pd.DataFrame(dyn.result(np.arange(len(train))))
    table["oof_loss"] = -np.log(p_true)
    table["oof_margin"] = margin(oof, y)
    return Scores(table=table[[*SCORE_NAMES, "never_learned"]], proxies=proxies, checkpoints=T)

"""The one place leanset reaches into LightGBM's internals, guarded."""

import lightgbm as lgb
import numpy as np

from ..errors import LeansetError


def training_scores(booster: lgb.Booster) -> np.ndarray:
    """The booster's current predictions on its training data (``data_idx=0``), as float64.

    Probabilities for classification, shape (n,) for binary and (n, k) for k classes; predicted
    values (n,) for regression. LightGBM keeps them up to date while it trains, so reading them at
    a checkpoint costs no prediction pass, and the array is LightGBM's own buffer, not a copy. They
    are only reachable through the private, name-mangled ``Booster.__inner_predict``; a LightGBM
    without it is refused with its version and the fix.

    Raises
    ------
    LeansetError
        When the installed LightGBM has no ``Booster.__inner_predict``.
    """
    inner = getattr(booster, "_Booster__inner_predict", None)
    if inner is None:
        raise LeansetError(f"lightgbm {lgb.__version__}: Booster has no private __inner_predict, which the gbdt proxy reads "
                           "its training predictions from; install a lightgbm 4.x release (pip install 'lightgbm>=4.3,<5')")
    return np.asarray(inner(data_idx=0), dtype=np.float64)

"""Score stage: every training row's difficulty from the proxies' training dynamics.

The same stage on a Dask cluster is :mod:`leanset.scores.cluster` (needs the ``dask`` extra).
"""

from .dynamics import Scores, agreement, score

__all__ = ["Scores", "agreement", "score"]

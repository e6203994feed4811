"""Score stage: every training row's difficulty from the proxies' training dynamics.

The same stage on a Dask cluster is :mod:`leanset.scores.cluster` (needs the ``dask`` extra).
"""

from .target_agreement import agreement
from .dynamics import Scores, score

__all__ = ["Scores", "agreement", "score"]

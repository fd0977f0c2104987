"""Integer labels (regions) carried through a correspondence: one algorithm for the package.

Both :meth:`Correspondence.transfer` (``labels=True``) and
:func:`surfacekit.transfer_labels` use :func:`vote_labels`.  It was chosen over an
area-weighted one-ring vote followed by a mode filter because it needs only the map
and was right as often or more often on the demo's template -> baseline transfer
(seeds 0 and 1, against the regions known from the shape's parameter sphere):
98.3% / 98.1% of baseline vertices against 97.9% / 97.9% (full size), 97.8% / 97.3%
against 96.5% / 97.3% (small).
"""
from __future__ import annotations

import numpy as np
import scipy.sparse as sp


def vote_labels(labels: np.ndarray, pull: np.ndarray, push_from: np.ndarray,
                push_to: np.ndarray, n_out: int) -> np.ndarray:
    """Integer labels carried by a majority vote of both map directions.

    Each output vertex j gets one vote (weight 1.5, so it wins ties) for the label at
    ``pull[j]`` and one vote for the label of every input vertex i with
    ``push_to[i] == j`` (i = ``push_from``).  Where the map is locally many-to-one,
    the pushed votes keep a region's extent that pulling alone would shrink.
    Shapes: labels (n_in,), pull (n_out,), push_from/push_to (n_in,); returns (n_out,)
    with the dtype of `labels`.
    """
    uniq, code = np.unique(labels, return_inverse=True)
    code = code.ravel()
    rows = np.concatenate([np.arange(n_out), push_to])
    cols = np.concatenate([code[pull], code[push_from]])
    w = np.concatenate([np.full(n_out, 1.5), np.ones(len(push_to))])
    votes = sp.coo_matrix((w, (rows, cols)), shape=(n_out, len(uniq))).tocsr()
    best = np.asarray(votes.argmax(axis=1)).ravel()
    return uniq[best].astype(labels.dtype, copy=False)

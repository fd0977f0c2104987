"""Label transfer from a template (atlas) surface to a subject through a correspondence."""
from __future__ import annotations

import numpy as np
import scipy.sparse as sp

from ..mesh.surface import Surface, SurfaceError
from .geometry import vertex_adjacency


def transfer_labels(template: Surface, labels: np.ndarray, subject: Surface, corr=None, *,
                    seed: int = 0, smooth: bool = True) -> tuple[np.ndarray, np.ndarray]:
    """Carry integer region labels from `template` to `subject` with a per-vertex confidence.

    Each subject vertex j votes over the template 1-ring of its matched vertex
    ``corr.target_to_source[j]`` (votes weighted by template vertex area), then
    (``smooth=True``) the votes are summed over the subject 1-ring, a one-step
    area-weighted mode filter (common practice for cleaning label maps) that
    removes isolated mislabelled vertices left by a vertex-level map.  The label
    is the vote winner; the confidence is its vote share times the
    correspondence confidence of the subject vertex (``corr.confidence``, 1 when
    absent): low near region borders and where the map is uncertain.

    Parameters
    ----------
    template : Surface carrying the labels (the correspondence source)
    labels : (template.n_vertices,) int region labels
    subject : Surface receiving them (the correspondence target)
    corr : Correspondence template -> subject; ``sk.match(template, subject, seed=seed)`` if None

    Returns
    -------
    labels_on_subject : (subject.n_vertices,) int64
    confidence : (subject.n_vertices,) float in [0, 1]
    """
    if not isinstance(template, Surface) or not isinstance(subject, Surface):
        raise SurfaceError("template and subject must be Surface objects")
    lab = np.asarray(labels)
    if lab.shape != (template.n_vertices,):
        raise ValueError(f"labels must have shape ({template.n_vertices},), got {lab.shape}")
    if lab.dtype.kind not in "iub":
        if lab.dtype.kind == "f" and np.all(np.isfinite(lab)) and np.all(lab == np.round(lab)):
            lab = lab.astype(np.int64)
        else:
            raise ValueError(f"labels must be integers, got dtype {lab.dtype}")
    if corr is None:
        from ..correspondence import match

        corr = match(template, subject, seed=seed)
    t2s = np.asarray(corr.target_to_source, dtype=np.int64)
    if t2s.shape != (subject.n_vertices,):
        raise SurfaceError(f"correspondence has {t2s.shape[0]} target entries for "
                           f"{subject.n_vertices} subject vertices")
    if t2s.min() < 0 or t2s.max() >= template.n_vertices:
        raise SurfaceError("correspondence refers to template vertices out of range")
    classes, idx = np.unique(lab, return_inverse=True)
    k = len(classes)
    # template-side area-weighted 1-ring votes: (n_template, k)
    onehot = sp.csr_matrix((template.vertex_areas, (np.arange(template.n_vertices), idx.ravel())),
                           shape=(template.n_vertices, k))
    votes = (vertex_adjacency(template) @ onehot)[t2s]
    if smooth:
        votes = vertex_adjacency(subject) @ sp.diags(subject.vertex_areas) @ votes
    votes = votes.toarray() if sp.issparse(votes) else np.asarray(votes)
    total = votes.sum(axis=1)
    winner = votes.argmax(axis=1)
    share = np.divide(votes[np.arange(len(winner)), winner], total,
                      out=np.zeros_like(total), where=total > 0)
    conf = getattr(corr, "confidence", None)
    if conf is not None:
        conf = np.clip(np.asarray(conf, dtype=np.float64), 0.0, 1.0)
        if conf.shape != share.shape:
            raise SurfaceError(f"correspondence confidence has shape {conf.shape}, "
                               f"expected {share.shape}")
        share = share * conf
    return classes[winner].astype(np.int64), share

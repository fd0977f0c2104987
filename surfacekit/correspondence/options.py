"""Options of :func:`surfacekit.match`."""
from __future__ import annotations

from dataclasses import asdict, dataclass, fields


@dataclass(frozen=True)
class MatchOptions:
    """Settings of the correspondence solver; the defaults suit organ surfaces of 1k–50k vertices.

    Attributes
    ----------
    n_eigen : int, default 60
        Laplace–Beltrami eigenpairs per surface; the final functional map is
        n_eigen x n_eigen.  Eigenbases are cached on the surfaces.
    n_samples : int, default 1000
        Well-spread vertices per surface on which the candidates are refined; the
        final map is extended to every vertex.
    zoomout_start, zoomout_step : int, default 6, 4
        First spectral size and increment of the ZoomOut refinement.
    same_orientation : bool or None, default None
        True: both scans share the scanner's orientation, so only poses within
        60 degrees of the identity are tried.  False: arbitrary pose (the identity
        gets no special treatment).  None: try the identity and all principal-axis
        poses (works in both situations).
    n_poses : int, default 4
        Distinct rigid poses (after a coarse ICP) refined into candidates.
    n_finalists : int, default 2
        Candidates (by energy after the coarse refinement up to `zoomout_mid`)
        refined up to `n_eigen`.
    zoomout_mid : int, default 20
        Spectral size at which candidates are compared and pruned.
    coordinate_weight : float, default 100.0
        Weight of the unit-size coordinates of the (deformed) source and the target
        appended to the spectral embedding during refinement (0 = purely intrinsic
        refinement).  The spectral rows have norm ~sqrt(k), coordinates ~0.3.
    deform_k : int, default 24
        Eigenfunctions in the smooth non-rigid ICP that deforms the aligned source
        onto the target before refinement (0 = rigid pose only).
    affine : bool, default True
        Fit an affine map (affine ICP) after the rigid pose and before the smooth
        deformation, absorbing anisotropic growth.
    bijective : bool, default True
        Estimate each functional map from both map directions.
    intrinsic_candidate : bool, default True
        Also build a candidate from descriptors alone (functional map with
        Laplacian, descriptor-commutativity and orientation terms).
    patch_descriptors : bool, default False
        Add geodesic polar patch descriptors of the mean curvature to the
        intrinsic candidate's descriptors (about 0.5 s per 1000 vertices).
    intrinsic_k : int, default 24
        Size of the descriptor-based functional map.
    icp_iterations : int, default 20
        Iterations of the rigid ICP that polishes each candidate pose.
    scaling : bool, default False
        Let the rigid pre-alignment also rescale (a similarity, Umeyama 1991) beyond
        the normalisation of both shapes to a common RMS radius.
    landmarks : tuple of (source_vertex, target_vertex) int pairs, default ()
        Any (l, 2) sequence or array is accepted and stored as a tuple of int
        pairs.  Known corresponding vertices (e.g. placed by an expert, or exported by
        :meth:`Correspondence.landmarks`).  They are used everywhere: with at least
        3, their Kabsch pose is tried first; they anchor every rigid, affine and
        smooth non-rigid fit (weight `landmark_weight`); heat kernels centred at
        them join the descriptors of the intrinsic functional map; they are
        imposed in every ZoomOut step and on the final maps; their misfit is
        added to the energy that picks the winning candidate.  On near-symmetric
        organs (a roughly round cross-section) three or four well-spread pairs
        fix what shape alone cannot.
    landmark_weight : float, default 0.25
        Share of the closest-point pairs that all landmarks together weigh in the
        extrinsic fits.
    check_ambiguity : bool, default True
        Probe whether a turn of the chosen pose fits better (about 0.15 s): adopt
        it if clearly so, and warn (:class:`AmbiguousMatchWarning`) if the shapes
        do not fix the rotation.
    max_turns : int, default 3
        Most turned poses adopted after the probe.
    partial : {"auto", "yes", "no"}, default "auto"
        Whether one surface may cover only part of the other (a cropped scan).
        "auto": when exactly one surface is open and one of its boundary loops is
        a cut (near-planar, not small), map that part into the whole
        (:mod:`.partial`); closed pairs always take the whole-to-whole route.
        "yes": treat the open (or else the smaller) surface as the part.  "no":
        never.
    """

    n_eigen: int = 60
    n_samples: int = 1000
    zoomout_start: int = 6
    zoomout_step: int = 4
    same_orientation: bool | None = None
    n_poses: int = 4
    n_finalists: int = 2
    zoomout_mid: int = 20
    coordinate_weight: float = 100.0
    deform_k: int = 24
    affine: bool = True
    bijective: bool = True
    intrinsic_candidate: bool = True
    patch_descriptors: bool = False
    intrinsic_k: int = 24
    icp_iterations: int = 20
    scaling: bool = False
    landmarks: tuple = ()
    landmark_weight: float = 0.25
    check_ambiguity: bool = True
    max_turns: int = 3
    partial: str = "auto"

    def __post_init__(self):
        # frozen: normalise the landmark pairs once, so the options hash, compare and save alike
        try:
            pairs = tuple((int(a), int(b)) for a, b in self.landmarks)
        except (TypeError, ValueError):
            raise ValueError("landmarks must be (source_vertex, target_vertex) pairs of integers, "
                             f"got {self.landmarks!r}") from None
        object.__setattr__(self, "landmarks", pairs)

    def validate(self) -> MatchOptions:
        if self.n_eigen < 4:
            raise ValueError(f"n_eigen must be >= 4, got {self.n_eigen}")
        if self.n_samples < 50:
            raise ValueError(f"n_samples must be >= 50, got {self.n_samples}")
        if not 1 <= self.zoomout_start <= self.n_eigen:
            raise ValueError(f"zoomout_start must be in [1, n_eigen], got {self.zoomout_start}")
        if self.zoomout_step < 1:
            raise ValueError(f"zoomout_step must be >= 1, got {self.zoomout_step}")
        if self.n_finalists < 1:
            raise ValueError(f"n_finalists must be >= 1, got {self.n_finalists}")
        if self.n_poses < 1:
            raise ValueError(f"n_poses must be >= 1, got {self.n_poses}")
        if self.coordinate_weight < 0:
            raise ValueError(f"coordinate_weight must be >= 0, got {self.coordinate_weight}")
        if self.max_turns < 0:
            raise ValueError(f"max_turns must be >= 0, got {self.max_turns}")
        if not self.landmark_weight >= 0:
            raise ValueError(f"landmark_weight must be >= 0, got {self.landmark_weight}")
        if self.same_orientation not in (None, True, False):
            raise ValueError(f"same_orientation must be None, True or False, got {self.same_orientation!r}")
        if self.partial not in ("auto", "yes", "no"):
            raise ValueError(f"partial must be 'auto', 'yes' or 'no', got {self.partial!r}")
        if any(a < 0 or b < 0 for a, b in self.landmarks):
            raise ValueError("landmarks must be non-negative vertex indices")
        return self

    def to_dict(self) -> dict:
        """JSON-able dict of all settings (landmarks as lists of two ints)."""
        d = asdict(self)
        d["landmarks"] = [list(p) for p in self.landmarks]
        return d

    @classmethod
    def from_dict(cls, d: dict) -> MatchOptions:
        """Options from :meth:`to_dict` output; unknown keys raise ValueError, missing ones keep defaults."""
        names = {f.name for f in fields(cls)}
        unknown = sorted(set(d) - names)
        if unknown:
            raise ValueError(f"unknown MatchOptions settings: {unknown}")
        return cls(**d)

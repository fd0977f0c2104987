"""Constants of the correspondence solver that were chosen by measurement, in one place.

Each value says where it comes from.  "The benchmark" is ``benchmarks/bench_match.py``
on the ground-truth pairs of ``tests/groundtruth.py`` (invented organ shapes with known
deformations) with generator seeds 0 and 1: a value called a benchmark choice was set
while developing the solver on those pairs (the git history keeps no finer record);
tests that check such values use other, held-out seeds (``groundtruth.TUNING_SEEDS``).
Lengths are in the unit-size frame of :func:`~.extrinsic.normalized_coordinates`
(an organ's RMS radius is about 0.28 there) unless a unit is given.
"""
from __future__ import annotations

# ---------------------------------------------------------------- coarse pose search
#: vertices per surface (farthest-point samples) in the short ICP that polishes every
#: candidate rotation: a speed choice on the benchmark (the pose only needs to land in
#: the right basin; the full ICP on `MatchOptions.n_samples` points follows).
COARSE_POSE_SAMPLES = 300
#: iterations of that short ICP; chosen with COARSE_POSE_SAMPLES on the benchmark.
COARSE_ICP_ITERATIONS = 8
#: poses (and the rival finalist below) closer than this angle (degrees) count as one: the
#: principal-axis candidates differ by 90 or 180 degrees, so this keeps them apart with
#: margin while merging ICP results that fell into the same basin (benchmark choice).
DISTINCT_POSE_DEG = 25.0
#: with `same_orientation=True` only candidate rotations within this angle (degrees) of the
#: identity are tried: scans in the same scanner orientation rarely differ by more (common
#: practice for patient positioning; not measured here).
SAME_ORIENTATION_DEG = 60.0
#: ICP stops when the symmetric RMS changes by less than this (unit-size frame): well below
#: the sample spacing (~0.03 at 1000 samples), so further steps hardly move the pose.
ICP_TOLERANCE = 1e-6

# ---------------------------------------------------------------- deformation
#: coarse-to-fine eigenfunction counts of the smooth non-rigid ICP (ending at
#: `MatchOptions.deform_k`): roughly geometric steps, as in spectral shape approximation
#: (Lévy, SMI 2006); the sequence was chosen on the benchmark.
DEFORM_SIZES = (3, 6, 10, 16, 24, 32, 48)
#: closest-point/least-squares iterations per size of the smooth non-rigid ICP (benchmark choice).
DEFORM_ITERATIONS = 4
#: smoothness penalty of the non-rigid ICP, `stiffness × n × Σ λ_a |A_a|²` on the unit-area
#: eigenvalues: a benchmark choice (growth, bend and noise pairs alike).
DEFORM_STIFFNESS = 1e-3
#: weight of the point-to-point term beside the point-to-plane misfit in the non-rigid ICP:
#: measured 8-19% lower map errors on the noisy and bent benchmark pairs than point-to-point.
DEFORM_SLIDE = 0.02
#: iterations of the affine ICP after the rigid pose (benchmark choice).
AFFINE_ICP_ITERATIONS = 10
#: robust pose residual: each vertex's point-to-plane misfit is capped at this percentile,
#: so that a growing region does not dominate the comparison of poses (benchmark choice).
POSE_RESIDUAL_PERCENTILE = 90.0

# ---------------------------------------------------------------- candidate energy
#: weight of the mean round-trip distance (both directions, summed) in the candidate energy,
#: relative to the pose residual (benchmark choice; small, so that between candidates in
#: different poses the pose residual decides).
ENERGY_ROUND_TRIP = 0.1
#: weight of the relative descriptor disagreement (1 = as bad as a random map) in the energy:
#: a tie-breaker only, since descriptors of near-symmetric organs are near-symmetric
#: themselves (benchmark choice).
ENERGY_DESCRIPTOR = 0.01

# ---------------------------------------------------------------- confidence
#: width of the per-vertex confidence exp(-(d / width)²) of the round-trip distance d: 0.05
#: is about 1.5 sample spacings at 1000 samples, so a round trip that lands on a neighbour
#: keeps a confidence above ~0.5 and one that lands farther away falls off fast (a design
#: choice, not tuned on ground truth).
CONFIDENCE_WIDTH = 0.05

# ---------------------------------------------------------------- rotation probe and turns
#: the probe turns the chosen pose by ± this angle (degrees) about each principal axis; the
#: thresholds below were measured with it (benchmark choice).
PROBE_ANGLE_DEG = 30.0
#: iterations of the affine ICP inside the probe (benchmark choice, with the thresholds below).
PROBE_AFFINE_ITERATIONS = 6
#: misfit ratio below which a turned pose is called undetermined by the shape.  Measured on
#: the benchmark organs: 0.90-1.10 on the synthetic ventricle (round cross-section),
#: 1.37-2.2 on the kidney, liver and hippocampus.
AMBIGUOUS_BELOW = 1.2
#: misfit ratio below which the solver adopts the turned pose and refines again: a turn that
#: fits clearly better means the pose search stopped in a local minimum (seen on the benchmark
#: organs grown anisotropically, whose stretched shape pulls the rigid fit 20-30 degrees off).
TURN_BELOW = 0.8
#: a turn is only tried while the affine misfit exceeds this multiple of the smooth non-rigid
#: fit's misfit.  Measured: 2.5-3.7 on the benchmark pairs whose turn fixed the map, 1.35 on
#: an exactly remeshed ellipsoid, where affine fits in every pose are equally good.
ROOM_ABOVE = 2.0
#: energy ratio within which a finalist turned by more than DISTINCT_POSE_DEG (usually a
#: 180-degree flip) counts as an equally good rival.  Measured on the benchmark pairs:
#: 1.007-1.044 on the ventricle pairs where flip and truth tie, 1.07-2.6 where the chosen map
#: is right.
RIVAL_WITHIN = 1.05

# ---------------------------------------------------------------- the rigid pose for change analysis
#: at most this many closest-point rounds of the point-to-plane ICP that refines the rigid
#: pose of the final map (correspondence.pose.rigid_pose).  Measured on the growth pairs of
#: benchmarks/bench_pose.py: 4-18 rounds reach POSE_TOLERANCE_MM; the cap only bounds a
#: noisy surface whose closest points keep switching (2 of 8 "mixed" pairs reach it).
POSE_ROUNDS = 20
#: a round whose step moves no source vertex by more than this (mm) and turns by less than
#: POSE_TOLERANCE_RAD ends the refinement: far below the resolution of clinical scans
#: (0.5-1 mm voxels, common practice).
POSE_TOLERANCE_MM = 1e-4
POSE_TOLERANCE_RAD = 1e-6
#: vertex rings around the matched target vertex whose faces are searched for the closest
#: point in the first round: a vertex-level map is off by about one edge.  Measured on the
#: held-out growth pairs: 2 rings (54 faces a vertex) give the same pose as 1 ring (24 faces)
#: to 0.001 mm, 0 rings (6 faces) up to 0.5 mm worse.
POSE_SEARCH_RINGS = 1
#: later rounds search the faces within this many rings of the target vertex nearest the
#: last closest point, a window that follows the closest points as the pose settles; 0
#: rings was up to 0.1 mm worse and slower to settle on the benchmark pairs.
POSE_FOLLOW_RINGS = 1
#: Tukey reweightings per round at most (the offsets are linear in the step, so they are
#: cheap); measured 2-44 to settle to POSE_TOLERANCE_MM / 10 on the benchmark pairs.
POSE_REWEIGHTINGS = 200
#: point-to-plane curvature, relative to the strongest direction, below which a direction
#: of the pose is left to the map (a sphere's turns: 0); measured at least 0.009 on the
#: benchmark organs.
POSE_WEAK_DIRECTION = 1e-3

# ---------------------------------------------------------------- the tube route
#: eigenfunctions of the smooth displacement fitted to the straightened match's map, which the
#: result reports as the deformation of the bent surfaces (a design choice: enough to follow a
#: 150-degree bend of the benchmark tubes, see benchmarks/bench_match.py --tubes).
TUBE_DEFORM_K = 40
#: smoothness penalty of that fit (as DEFORM_STIFFNESS; a design choice).
TUBE_DEFORM_STIFFNESS = 1e-4
#: rings of equal relative distance to the two ends whose centroids define a tube's centreline
#: (a design choice: rings about 5 mm wide on a 130 mm tube).
TUBE_CENTRELINE_BINS = 24
#: points of the resampled centreline (joints of about 1 degree on a tube bent by 150 degrees).
TUBE_CENTRELINE_POINTS = 160
#: smoothing of the centreline spline, relative to the cube of its length: measured on bent tube
#: pairs (seeds 300 and 305 at 1000 vertices) 1e-3 gave mean errors 0.023-0.024, 1e-4 0.026,
#: 1e-2 0.027, 1e-6 0.05-0.37 (the centreline follows the rings' scatter).
TUBE_CENTRELINE_SMOOTHING = 1e-3
#: the tube route is tried when λ2/λ1 of either surface exceeds this (a rod: 4; measured on the
#: benchmark organs: kidney 1.9-2.3, liver 1.3-1.4, ventricle 1.7, hippocampus 3.2-3.4, tube 3.1-3.2).
TUBE_MIN_EIGEN_RATIO = 2.6
#: ... and its geodesic length over sqrt(area) exceeds this (measured: hippocampus 1.18-1.26,
#: tubes bent by 60-150 degrees 1.34-1.45, kidney 0.86-0.89).
TUBE_MIN_LENGTH = 1.3
#: the straightened match replaces the direct one when its energy is below this share of it.
#: Measured: 0.18-0.34 on tubes bent by 60-150 degrees; 0.8 let a benchmark pair of the
#: hippocampus (hippocampus/anisotropic/seed116 at 1500 vertices, whose direct map is good) switch.
TUBE_ENERGY_RATIO = 0.5
#: rounds of redrawing the centreline from rings across the previous one (measured as above:
#: 1 round 0.023, none 0.024, 2 rounds 0.025).
TUBE_CENTRELINE_ROUNDS = 1

# ---------------------------------------------------------------- nothing to match
#: selection energy (candidates.energy) of the chosen map at or above which two surfaces are
#: called not the same organ.  Measured at 1500/1800 vertices: 0.0069-0.0184 on the 40 benchmark
#: pairs (benchmark_pairs), 0.0055-0.0087 on six bent tube pairs (tube_pairs), 0.021-0.090 on the
#: 20 ordered pairs of different organ kinds (kidney, liver, hippocampus, ventricle, tube; the
#: lowest, 0.021-0.023, between the tube and the hippocampus, itself a bent tube).
MISMATCH_ENERGY = 0.021
#: Laplace spectrum distance (Reuter et al. 2006, weighted, first 40 eigenvalues) at or above which
#: the same is said: 0.02-0.92 on the benchmark pairs (noise raises it most), 0.34-1.22 between
#: different organ kinds; only a backstop for shapes far apart whatever the pose.
MISMATCH_SPECTRUM = 1.5
#: eigenvalues compared by that distance.
MISMATCH_SPECTRUM_K = 40

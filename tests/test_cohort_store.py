"""The cohort field store (surfacekit/cohort/store.py): plain Zarr and Dask can read it, the group
test on it equals the in-memory test, and an interrupted run resumes without rewriting chunks."""
from __future__ import annotations

import filecmp
import shutil
from pathlib import Path

import dask.array as da
import numpy as np
import pytest
import zarr

import surfacekit as sk
from surfacekit.cohort.manifest import Manifest, ManifestEntry
from surfacekit.cohort.run import STORE_NAME
from surfacekit.cohort.store import create_field_store, open_field_store
from surfacekit.cohort.tables import write_fields_matrix, write_group_test

N_SUBJECTS, N_VERTICES = 24, 300
RESULT_FIELDS = ("t", "p_fwer", "q_fdr", "p_uncorrected", "effect", "max_null")


def _synthetic(seed: int = 0):
    """Normal displacement of 24 subjects (control, case alternating); the cases lie 2 mm
    further outward on the first 40 vertices; ages as a covariate."""
    rng = np.random.default_rng(seed)
    groups = np.array(["control", "case"] * (N_SUBJECTS // 2))
    nd = rng.normal(0.0, 0.5, (N_SUBJECTS, N_VERTICES))
    nd[groups == "case", :40] += 2.0
    age = rng.uniform(40, 80, N_SUBJECTS)
    return nd, groups, age


def _layout():
    return {"normal_displacement": (N_VERTICES,), "log_area_ratio": (N_VERTICES,),
            "laplace_spectrum": (5,)}


def _row(nd, i):
    return {"normal_displacement": nd[i], "log_area_ratio": 0.01 * nd[i],
            "laplace_spectrum": np.arange(1.0, 6.0) * (1 + i)}


def _store(path, nd, rows=None):
    store = create_field_store(path, [f"s{i:02d}" for i in range(N_SUBJECTS)], _layout(),
                               units={"normal_displacement": "mm"})
    for i in range(N_SUBJECTS) if rows is None else rows:
        store.write_subject(i, _row(nd, i))
    return store


def _chunk_files(path: Path) -> dict:
    return {p.relative_to(path): p.stat().st_mtime_ns for p in path.rglob("*")
            if p.is_file() and p.name != "zarr.json"}


def test_store_opens_with_plain_zarr_and_dask(tmp_path):
    nd, _, _ = _synthetic()
    path = tmp_path / "fields.zarr"
    _store(path, nd, rows=range(0, N_SUBJECTS, 2))
    group = zarr.open(path, mode="r")
    assert list(group.attrs["subjects"]) == [f"s{i:02d}" for i in range(N_SUBJECTS)]
    assert group["normal_displacement"].chunks == (1, N_VERTICES)
    lazy = da.from_zarr(str(path), component="normal_displacement")
    values = lazy.compute()
    np.testing.assert_array_equal(values[::2], nd[::2])
    assert np.isnan(values[1::2]).all()                          # never written: NaN fill
    written = np.asarray(group["written"][:], dtype=bool)
    assert written[::2].all() and not written[1::2].any()
    store = open_field_store(path)
    np.testing.assert_array_equal(store.written(), np.arange(N_SUBJECTS) % 2 == 0)
    np.testing.assert_array_equal(store.dask("normal_displacement", [4, 2]).compute(), nd[[4, 2]])


def test_bad_store_input_is_refused_with_a_clear_error(tmp_path):
    nd, _, _ = _synthetic()
    store = _store(tmp_path / "fields.zarr", nd, rows=[])
    with pytest.raises(ValueError, match="expected shape"):
        store.write_subject(0, {"normal_displacement": np.zeros(N_VERTICES + 1)})
    assert not store.written().any()
    with pytest.raises(KeyError, match="not in the field store"):
        store.write_subject("nobody", _row(nd, 0))
    (tmp_path / "notes").mkdir()
    with pytest.raises(ValueError, match="not a surfacekit field store"):
        create_field_store(tmp_path / "notes", ["a"], {"x": (3,)})
    assert (tmp_path / "notes").is_dir()                         # refused, never deleted
    # another subject list replaces the store (a changed manifest)
    other = create_field_store(tmp_path / "fields.zarr", ["a", "b"], {"x": (3,)})
    assert other.subjects == ("a", "b") and not other.written().any()


@pytest.mark.parametrize("with_covariates", [False, True])
def test_group_test_on_the_store_equals_the_in_memory_test(tmp_path, with_covariates):
    """Every output of vertexwise_group_test agrees to 1e-12 between numpy input and the
    store's Dask rows, also with vertex blocks of another size (the blocks are independent
    except for the maximum over vertices, Nichols & Holmes, Hum. Brain Mapp. 2002)."""
    nd, groups, age = _synthetic()
    store = _store(tmp_path / "fields.zarr", nd)
    case, control = groups == "case", groups == "control"
    cov = np.r_[age[case], age[control]] if with_covariates else None
    reference = sk.vertexwise_group_test(nd[case], nd[control], n_permutations=199, seed=3,
                                         covariates=cov)
    for block in (None, 70):
        lazy = sk.vertexwise_group_test(store.dask("normal_displacement", case),
                                        store.dask("normal_displacement", control),
                                        n_permutations=199, seed=3, covariates=cov,
                                        vertex_block=block)
        for name in RESULT_FIELDS:
            np.testing.assert_allclose(getattr(lazy, name), getattr(reference, name),
                                       rtol=0, atol=1e-12, err_msg=name)
        assert lazy.df == reference.df
    assert reference.p_fwer[:40].max() < 0.05 and np.mean(reference.p_fwer[40:] < 0.05) < 0.05


def test_group_test_table_from_the_store_equals_the_npz_table(tmp_path):
    """group_test.csv written from the store and from the NPZ export: the same columns."""
    nd, groups, age = _synthetic()
    store = _store(tmp_path / "fields.zarr", nd)
    entries = tuple(ManifestEntry(f"s{i:02d}", Path(f"s{i:02d}.ply"), group=g,
                                  covariates={"age": f"{a:.3f}"})
                    for i, (g, a) in enumerate(zip(groups, age)))
    manifest = Manifest(tmp_path / "m.csv", entries, None, ("age",))
    rows = [{"status": "ok"}] * N_SUBJECTS
    npz = write_fields_matrix(tmp_path / "cohort_fields.npz", manifest, rows, store)
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    write_group_test(tmp_path / "a" / "g.csv", manifest, rows, store, n_permutations=99, seed=1)
    write_group_test(tmp_path / "b" / "g.csv", manifest, rows, npz, n_permutations=99, seed=1)
    a = np.genfromtxt(tmp_path / "a" / "g.csv", delimiter=",", names=True)
    b = np.genfromtxt(tmp_path / "b" / "g.csv", delimiter=",", names=True)
    assert a.dtype.names == b.dtype.names and len(a.dtype.names) == 7
    for name in a.dtype.names:
        np.testing.assert_allclose(a[name], b[name], rtol=1e-12, atol=1e-12, err_msg=name)
    with np.load(npz) as data:
        np.testing.assert_array_equal(data["normal_displacement"], nd)
        assert data["ok"].all()


def test_interrupted_writing_resumes_without_rewriting_chunks(tmp_path):
    """Half the subjects written, then stopped; the resumed run writes only the missing rows
    (finished chunks keep their modification times) and ends with the same bytes and tables
    as a run written in one go."""
    nd, _, _ = _synthetic()
    whole = _store(tmp_path / "whole.zarr", nd)
    half = _store(tmp_path / "resumed.zarr", nd, rows=range(N_SUBJECTS // 2))
    before = _chunk_files(half.path)
    resumed = create_field_store(half.path, half.subjects, _layout())  # the next run
    missing = np.flatnonzero(~resumed.written())
    assert list(missing) == list(range(N_SUBJECTS // 2, N_SUBJECTS))
    for i in missing:
        resumed.write_subject(int(i), _row(nd, int(i)))
    after = _chunk_files(resumed.path)
    assert all(after[p] == t for p, t in before.items())          # nothing rewritten
    assert set(after) == set(_chunk_files(whole.path))
    for rel in after:
        assert filecmp.cmp(whole.path / rel, resumed.path / rel, shallow=False), rel
    entries = tuple(ManifestEntry(s, Path(f"{s}.ply"), group="ab"[i % 2])
                    for i, s in enumerate(whole.subjects))
    manifest = Manifest(tmp_path / "m.csv", entries, None, ())
    rows = [{"status": "ok"}] * N_SUBJECTS
    for store, name in ((whole, "whole"), (resumed, "resumed")):
        (tmp_path / name).mkdir()
        write_fields_matrix(tmp_path / name / "f.npz", manifest, rows, store)
        write_group_test(tmp_path / name / "g.csv", manifest, rows, store, n_permutations=49,
                         seed=0)
    for table in ("f.npz", "g.csv", "g.json"):
        assert filecmp.cmp(tmp_path / "whole" / table, tmp_path / "resumed" / table,
                           shallow=False), table


def test_shape_model_on_the_store_equals_the_in_memory_model(tmp_path):
    """Procrustes alignment (Gower 1975) and the PCA shape model (Cootes et al. 1995) of
    template + displacement read from the store, a block of subjects or coordinates at a
    time, equal the in-memory computation to 1e-12 (modes up to rounding of the Gram matrix)."""
    rng = np.random.default_rng(5)
    template = rng.normal(size=(120, 3)) * [30.0, 20.0, 10.0]
    n = 10
    rotations = [sk.synthetic.random_rotation(i) for i in range(n)]
    positions = np.stack([(template + rng.normal(0, 0.8, template.shape)) @ rot.T * (1 + 0.05 * i)
                          + rng.normal(0, 5, 3) for i, rot in enumerate(rotations)])
    store = create_field_store(tmp_path / "shapes.zarr", [f"s{i}" for i in range(n)],
                               {"displacement": template.shape})
    for i in range(n):
        store.write_subject(i, {"displacement": positions[i] - template})
    lazy_shapes = store.shapes(template)
    for scaling in (False, True):
        reference = sk.shape_model(positions, scaling=scaling)
        lazy = sk.shape_model(lazy_shapes, scaling=scaling)
        np.testing.assert_allclose(lazy.mean, reference.mean, rtol=0, atol=1e-12)
        np.testing.assert_allclose(lazy.variances, reference.variances, rtol=1e-12, atol=1e-12)
        np.testing.assert_allclose(lazy.modes, reference.modes, rtol=0, atol=1e-12)
        np.testing.assert_allclose(np.asarray(lazy.training), reference.training, rtol=0,
                                   atol=1e-12)
        gpa = sk.generalized_procrustes(lazy_shapes, scaling=scaling)
        assert gpa.n_iter == sk.generalized_procrustes(positions, scaling=scaling).n_iter


# ------------------------------------------------------------------ the cohort run


def _bulge(q, p):
    return q + 2.5 * np.exp(-((p[:, 0] - 1) ** 2 + p[:, 1] ** 2 + p[:, 2] ** 2) / 0.3)[:, None] * p


@pytest.fixture(scope="module")
def small_cohort(tmp_path_factory):
    """A template and four subjects in two groups; the second group bulged on one pole."""
    folder = tmp_path_factory.mktemp("store_cohort")
    template, _ = sk.synthetic.organ_surface("kidney", 600, seed=100)
    sk.save(template, folder / "template.ply")
    lines = ["subject,path,label,group,role,age,sex", "atlas,template.ply,,,template,,"]
    for i in range(4):
        s, _ = sk.synthetic.organ_surface("kidney", 600, seed=i, deform=_bulge if i % 2 else None)
        sk.save(s, folder / f"k{i}.ply")
        lines.append(f"k{i},k{i}.ply,,{'ab'[i % 2]},subject,{50 + 7 * i},")
    (folder / "cohort.csv").write_text("\n".join(lines) + "\n")
    return folder / "cohort.csv"


OPTIONS = {"target_vertices": 600, "n_eigenvalues": 20, "n_permutations": 50, "progress": False}
TABLES = ("cohort_summary.csv", "group_test.csv", "cohort_fields.npz")


@pytest.mark.slow
@pytest.mark.filterwarnings("ignore:covariate 'sex' not used")
def test_cohort_run_writes_the_store_and_resumes_from_it(small_cohort, tmp_path):
    """Each subject's fields land in its store row; a run interrupted after two subjects
    (simulated: their markers and rows removed) recomputes only those, leaves the other rows'
    chunks untouched and ends with byte-identical tables; a lost store is rebuilt from the
    subjects' own fields without recomputing."""
    out = tmp_path / "out"
    first = sk.run_cohort(small_cohort, out, **OPTIONS)
    assert first.n_failed == 0 and first.tables["field_store"] == out / STORE_NAME
    store = open_field_store(out / STORE_NAME)
    assert store.subjects == ("k0", "k1", "k2", "k3") and store.written().all()
    for i, subject in enumerate(store.subjects):
        own = sk.load_fields(out / "subjects" / subject / "fields.npz")
        for name in ("normal_displacement", "log_area_ratio", "displacement"):
            np.testing.assert_array_equal(store.read(name, i), own[name])
    reference = {name: (out / name).read_bytes() for name in TABLES}
    # simulated interruption: k1 and k2 never finished
    writable = open_field_store(out / STORE_NAME, writable=True)
    for subject in ("k1", "k2"):
        for marker in (out / "subjects" / subject).glob("*.done"):
            marker.unlink()
        writable.clear_subject(subject)
    for name in TABLES:
        (out / name).unlink()
    kept = {p: t for p, t in _chunk_files(out / STORE_NAME).items()
            if p.parts[p.parts.index("c") + 1] in ("0", "3")}           # rows of k0 and k3
    assert len(kept) >= 2 * 5
    resumed = sk.run_cohort(small_cohort, out, **OPTIONS)
    assert resumed.n_computed == 2 and resumed.n_cached == 2
    now = _chunk_files(out / STORE_NAME)
    assert all(now[p] == t for p, t in kept.items())
    assert all((out / name).read_bytes() == data for name, data in reference.items())
    # the store lost: rebuilt from each subject's fields.npz, nothing recomputed
    shutil.rmtree(out / STORE_NAME)
    rebuilt = sk.run_cohort(small_cohort, out, **OPTIONS)
    assert rebuilt.n_computed == 0 and open_field_store(out / STORE_NAME).written().all()
    assert all((out / name).read_bytes() == data for name, data in reference.items())

"""Change analysis at real sizes: time and peak memory of sk.match and sk.measure_change.

For each size, one synthetic ground-truth pair (an invented organ-like shape and a deformed,
re-meshed, re-posed copy with 1.1x the vertices; tests/groundtruth.py) is written to a
temporary folder, and every measurement runs in a fresh Python process:

  * match          sk.match on the pair
  * change (warm)  sk.measure_change in the same process right after the match, on the
                   same Surface objects (what sk.compare and `surfacekit change` do: the
                   surfaces' cached operators are reused)
  * change (cold)  sk.measure_change in a new process on surfaces and a correspondence
                   read from files (nothing cached: it also builds the Laplacian and the
                   mesh connectivity itself)

Memory is the resident set size of the whole process (numpy, scipy's sparse factorisation
and every other C allocation included): "base" is the RSS before the call (interpreter,
libraries and inputs loaded), "peak" the high-water mark during the call (VmHWM of
/proc/self/status after resetting it through /proc/self/clear_refs, Linux >= 4.0; where
that is refused, resource.getrusage(RUSAGE_SELF).ru_maxrss, the peak of the whole process
and of its parent at the fork, marked "*"), and "+" the increment peak - base.  In the warm
run the base includes heap the match freed but the allocator kept, which measure_change
reuses: there the increment understates its need and the peak is the number to read.  With
--tracemalloc the cold run is repeated under tracemalloc, which sees the Python-side
allocations only (numpy arrays; not scipy's sparse factorisation), and its peak is printed.

Targets: measure_change no slower than the match, and at most 500 MB peak at 50k vertices,
checked on the cold run (measure_change alone in a process; in the warm run the process
also holds what the match built and cached, and its peak is the match's).
Timings are inflated when other processes share the machine (the load average is printed).

Usage: python benchmarks/bench_change.py [--sizes 20000 50000] [--kind kidney] [--tracemalloc]
"""
from __future__ import annotations

import argparse
import gc
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
# the ground-truth generator is a module of the test suite; benchmarks are scripts beside it
sys.path.insert(0, str(HERE.parent / "tests"))

PEAK_TARGET_MB = 500.0


def _rss_mb(key: str = "VmRSS:") -> float:
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith(key):
                return int(line.split()[1]) / 1024.0
    return float("nan")


def _reset_peak() -> bool:
    """Reset the process's RSS high-water mark; False where the kernel refuses."""
    try:
        with open("/proc/self/clear_refs", "w") as fh:
            fh.write("5")
        return True
    except OSError:
        return False


def _measured(fn):
    """Run fn(); return (result, dict of wall/CPU seconds and base/peak RSS in MB)."""
    gc.collect()
    reset = _reset_peak()
    base = _rss_mb()
    wall, cpu = time.perf_counter(), time.process_time()
    out = fn()
    wall, cpu = time.perf_counter() - wall, time.process_time() - cpu
    # VmHWM is the high-water mark the reset clears; ru_maxrss also keeps the peak of the
    # parent at the fork (Linux carries it across exec), so it is only the fallback
    peak = (_rss_mb("VmHWM:") if reset
            else resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0)
    return out, {"wall_s": wall, "cpu_s": cpu, "base_mb": base, "peak_mb": peak, "reset": reset}


def _load(folder: Path):
    import surfacekit as sk

    d = np.load(folder / "pair.npz")
    return sk.Surface(d["sv"], d["sf"]), sk.Surface(d["tv"], d["tf"])


def child(mode: str, folder: Path, trace: bool) -> dict:
    """One measurement in this (fresh) process; `mode` is "match" or "cold"."""
    import surfacekit as sk

    sk.match, sk.measure_change  # noqa: B018  (resolve the lazy imports before timing)
    warnings.simplefilter("ignore")
    base, follow = _load(folder)
    out = {}
    if mode == "match":
        corr, out["match"] = _measured(lambda: sk.match(base, follow))
        corr.save(folder / "corr.npz")
        _, out["change_warm"] = _measured(lambda: sk.measure_change(base, follow, corr))
        return out
    corr = sk.Correspondence.load(folder / "corr.npz")
    if trace:
        import tracemalloc

        tracemalloc.start()
        sk.measure_change(base, follow, corr)
        out["tracemalloc_peak_mb"] = tracemalloc.get_traced_memory()[1] / 2**20
        tracemalloc.stop()
        return out
    _, out["change_cold"] = _measured(lambda: sk.measure_change(base, follow, corr))
    return out


def _run_child(mode: str, folder: Path, trace: bool = False) -> dict:
    cmd = [sys.executable, __file__, "--child", mode, str(folder)] + (["--tracemalloc"] if trace else [])
    res = subprocess.run(cmd, capture_output=True, text=True, check=False)
    if res.returncode != 0:
        raise SystemExit(f"benchmark child ({mode}) failed:\n{res.stderr}")
    return json.loads(res.stdout.strip().splitlines()[-1])


def make_pair_files(kind: str, n: int, folder: Path) -> tuple[int, int]:
    from groundtruth import make_pair

    pair = make_pair(kind, "mixed", n_source=n, n_target=int(1.1 * n), seed=3)
    np.savez(folder / "pair.npz", sv=pair.source.vertices, sf=pair.source.faces,
             tv=pair.target.vertices, tf=pair.target.faces)
    return pair.source.n_vertices, pair.target.n_vertices


def _cell(m: dict) -> str:
    star = "" if m["reset"] else "*"
    return (f"{m['wall_s']:6.2f} s ({m['cpu_s']:6.2f} CPU)  base {m['base_mb']:5.0f}  "
            f"peak {m['peak_mb']:5.0f}{star}  +{m['peak_mb'] - m['base_mb']:4.0f} MB")


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", type=int, nargs="+", default=[20000, 50000],
                    help="baseline vertex counts (the follow-up gets 1.1x)")
    ap.add_argument("--kind", default="kidney", help="organ kind of tests/groundtruth.py")
    ap.add_argument("--tracemalloc", action="store_true",
                    help="also report tracemalloc's peak (Python-side allocations) of a cold run")
    ap.add_argument("--child", nargs=2, metavar=("MODE", "FOLDER"), help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.child:
        print(json.dumps(child(args.child[0], Path(args.child[1]), args.tracemalloc)))
        return 0
    print(f"load average at start: {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores "
          "(timings are inflated when other processes share the machine)")
    failures = []
    for n in args.sizes:
        with tempfile.TemporaryDirectory() as tmp:
            folder = Path(tmp)
            nb, nf = make_pair_files(args.kind, n, folder)
            res = _run_child("match", folder)
            res.update(_run_child("cold", folder))
            if args.tracemalloc:
                res.update(_run_child("cold", folder, trace=True))
        print(f"\n{args.kind}/mixed, baseline {nb} vertices, follow-up {nf} vertices "
              f"(load {os.getloadavg()[0]:.1f})")
        for key, label in (("match", "match"), ("change_warm", "change (warm)"),
                           ("change_cold", "change (cold)")):
            print(f"  {label:14s} {_cell(res[key])}")
        if "tracemalloc_peak_mb" in res:
            print(f"  change (cold) tracemalloc peak (Python-side allocations): "
                  f"{res['tracemalloc_peak_mb']:.0f} MB")
        t_match = res["match"]["wall_s"]
        for key in ("change_warm", "change_cold"):
            m = res[key]
            line = f"  {key}: time / match {m['wall_s'] / t_match:.2f} (target <= 1)"
            if m["wall_s"] > t_match:
                failures.append(f"{n} {key} time")
            if n >= 50000 and key == "change_cold":
                line += f", peak {m['peak_mb']:.0f} MB (target <= {PEAK_TARGET_MB:.0f})"
                if m["peak_mb"] > PEAK_TARGET_MB:
                    failures.append(f"{n} {key} memory")
            print(line)
    print("\nall targets met" if not failures else f"\ntargets missed: {failures}")
    return 0


if __name__ == "__main__":
    sys.exit(main())

"""Quick tour on the shipped synthetic sample mesh (invented data, not a patient)."""
from pathlib import Path

import numpy as np

import surfacekit as sk

here = Path(__file__).resolve().parent.parent / "sample_meshes"
s = sk.load(here / "synthetic_kidney_baseline.ply")
print(s, f"area {s.area:.0f} mm², volume {s.volume / 1000:.1f} ml, genus {s.genus}")
basis = sk.eigenbasis(s, 50)
print("first eigenvalues (1/mm²):", np.round(basis.values[:6], 6), "solver:", basis.solver)
hks = sk.heat_kernel_signature(s, basis=basis)
print("heat kernel signature:", hks.shape)

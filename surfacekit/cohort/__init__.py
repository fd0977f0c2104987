"""The cohort stage: a manifest of subjects run through the pipeline on local processes or a
Dask cluster, resumable, with cohort tables and fields."""
from .engines import UnguardedScriptError
from .run import CohortFailedError, CohortResult, run_cohort
from .store import FieldStore, open_field_store

__all__ = ["CohortFailedError", "CohortResult", "FieldStore", "UnguardedScriptError",
           "open_field_store", "run_cohort"]

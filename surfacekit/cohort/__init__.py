"""The cohort stage: a manifest of subjects run through the pipeline on local processes or a
Dask cluster, resumable, with cohort tables and fields."""
from .engines import UnguardedScriptError
from .run import CohortFailedError, CohortResult, run_cohort

__all__ = ["CohortFailedError", "CohortResult", "UnguardedScriptError", "run_cohort"]

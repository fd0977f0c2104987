"""The cohort stage: a manifest of subjects run through the pipeline on local processes or a
Dask cluster, resumable, with cohort tables and fields."""
from .run import CohortResult, run_cohort

__all__ = ["CohortResult", "run_cohort"]

"""Input stage: the study spec, reading and validating records, the cohort and the design matrix."""

from casemix.data.cohort import Cohort, build_cohort
from casemix.data.design import Design
from casemix.data.records import Records, read_records
from casemix.data.spec import Spec, load_spec

__all__ = ["Cohort", "Design", "Records", "Spec", "build_cohort", "load_spec", "read_records"]

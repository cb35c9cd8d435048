"""The scheduled batch job: incremental, idempotent, crash-safe (see :mod:`labeler.job.run`)."""
from .failpoints import FAILPOINTS
from .lock import RunLock
from .run import JobResult, run_job
from .state import current_outputs, load_state

__all__ = ["FAILPOINTS", "JobResult", "RunLock", "current_outputs", "load_state", "run_job"]

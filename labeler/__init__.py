"""labeler: in-profile or new interest, one consistent answer per interaction.

>>> import labeler
>>> sorted(n for n in labeler.__all__ if n.startswith("build"))
['build_footprints', 'build_taxonomy']
"""
from . import version
from .config import EngineConfig, GateConfig, InputConfig, JobConfig, LabelConfig, TaxonomyConfig, \
    load_job_config
from .errors import ArtifactError, ConfigError, InputError, LabelerError, ModelNotFoundError
from .evaluation import Evaluation, evaluate
from .job import run_job
from .labels import Carried, build_footprints, label_interactions, plan_labels
from .rollout import RolloutResult, check_rollout
from .store import Classification, Erasure, Footprint, Store, TopicState, forget_users, open_store, publish_store
from .taxonomy import Taxonomy, build_taxonomy

__version__ = version.__version__  # written once, in labeler/version.py

__all__ = ["ArtifactError", "ConfigError", "EngineConfig", "GateConfig", "InputConfig", "InputError",
           "JobConfig", "LabelConfig", "LabelerError", "ModelNotFoundError", "Taxonomy", "TaxonomyConfig",
           "build_footprints", "build_taxonomy", "label_interactions", "load_job_config", "plan_labels",
           "Classification", "Footprint", "Store", "TopicState", "forget_users", "open_store", "publish_store",
           "RolloutResult", "check_rollout", "run_job", "Carried", "Erasure", "Evaluation", "evaluate"]

"""The pipeline: one line file through every stage (read → fit → field → store → rules →
alerts, and the products once a scan is complete), for the daemon and for one
``strayline process`` pass and a ``strayline refit`` of stored spectra alike.
"""

from strayline.pipeline._setup import PROFILE_RULE, fit_model_from_config, profile_event, zfs_rule
from strayline.pipeline.folder import ProcessSummary, default_workers, process_folder
from strayline.pipeline.line_pipeline import LinePipeline
from strayline.pipeline.outcome import LineOutcome, PipelineStatistics
from strayline.pipeline.refit import refit_stores

__all__ = [
    "PROFILE_RULE",
    "LineOutcome",
    "LinePipeline",
    "PipelineStatistics",
    "ProcessSummary",
    "default_workers",
    "fit_model_from_config",
    "process_folder",
    "profile_event",
    "refit_stores",
    "zfs_rule",
]

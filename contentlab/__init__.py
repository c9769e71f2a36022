"""contentlab: learn from your own post history what drives engagement.

The public Python API is imported lazily so that ``import contentlab`` (and
the command line's ``--help``) stay fast.
"""

from __future__ import annotations

__version__ = "0.1.0"

_LAZY = {
    "Workspace": ("contentlab.workspace", "Workspace"),
    "import_history": ("contentlab.history", "import_history"),
    "read_history": ("contentlab.ingest", "read_history"),
    "read_drafts": ("contentlab.readers", "read_drafts"),
    "read_results": ("contentlab.readers", "read_results"),
    "HeadlineFeaturizer": ("contentlab.features", "HeadlineFeaturizer"),
    "ContentlabError": ("contentlab.errors", "ContentlabError"),
    "ThompsonBandit": ("contentlab.bandit", "ThompsonBandit"),
    "score_drafts": ("contentlab.scoring", "score_drafts"),
    "EngagementModel": ("contentlab.model", "EngagementModel"),
    "PenalizedBinomialGLM": ("contentlab.glm", "PenalizedBinomialGLM"),
    "create_experiment": ("contentlab.experiments", "create_experiment"),
    "next_allocation": ("contentlab.experiments", "next_allocation"),
    "record_results": ("contentlab.experiments", "record_results"),
    "experiment_status": ("contentlab.experiments", "experiment_status"),
    "build_report": ("contentlab.report", "build_report"),
    "write_report": ("contentlab.report", "write_report"),
}


def __getattr__(name: str):
    if name in _LAZY:
        import importlib

        module, attr = _LAZY[name]
        return getattr(importlib.import_module(module), attr)
    raise AttributeError(f"module 'contentlab' has no attribute {name!r}")


__all__ = sorted(_LAZY)

"""realopt: value the flexibility inside a capital project on a binomial lattice.

Public API: ``load_project(path, overrides=None) -> Project`` and ``appraise(project) -> Appraisal``.
Results support, and do not replace, professional judgement.
"""
from .model import Project  # noqa: F401
from .errors import RealoptError, ProjectError, ValuationError  # noqa: F401

__all__ = ["Project", "RealoptError", "ProjectError", "ValuationError", "appraise",
           "load_project", "CAUTION"]
__version__ = "0.1.0"

CAUTION = (
    "Caution: these results rest on the inputs and the model's assumptions (a binomial lattice of "
    "project value, risk-neutral valuation, the stated volatility and rates). They support, and do "
    "not replace, professional judgement; local regulations and licensed financial, tax and legal "
    "advice take precedence."
)


def appraise(project, **kwargs):
    """Value every right of ``project``; returns an :class:`realopt.appraisal.Appraisal`
    (``valuation: simulation``: a :class:`realopt.simulation.result.SimulationAppraisal`)."""
    if getattr(project, "valuation", "lattice") == "simulation":
        from .simulation import appraise as _simulate

        return _simulate(project, **kwargs)
    from .appraisal import appraise as _appraise

    return _appraise(project, **kwargs)


def load_project(path, overrides=None):
    """Read and validate a YAML project file; ``overrides`` maps dotted keys to values."""
    from .project import load_project as _load

    return _load(path, overrides)

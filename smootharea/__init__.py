"""smootharea: Bayesian small-area disease mapping.

Data flow, one step per module:
``job`` (read the job file) -> ``load`` (read and validate inputs, expected
counts) -> ``graph`` (neighbour graph) -> ``frequentist`` (references) ->
``model`` (PyMC model from a recipe) -> ``sampling`` (nutpie) ->
``diagnostics`` (verdict) -> ``summarise`` (risks, exceedance, ranks) ->
``outputs`` / maps / report / history.
"""
from __future__ import annotations

__version__ = "0.1.0"

__all__ = ["fit", "job_from_frame", "load_job", "prepare", "run_job", "__version__"]


def __getattr__(name: str):
    # Lazy so that `import smootharea.job` does not pull in PyMC and friends.
    if name in __all__:
        from . import api
        return getattr(api, name)
    raise AttributeError(f"module 'smootharea' has no attribute {name!r}")

"""labelprep: turn folders of labeled images into a clean, leak-free, well-balanced training set.

The public API mirrors the command line::

    import labelprep
    m = labelprep.scan("photos/")            # one row per file, with facts and hashes
    m = labelprep.check(m, min_side=32)      # issue codes for bad files
    m = labelprep.group(m)                   # exact and near-duplicate clusters
    m = labelprep.split(m, seed=0)           # leak-free train/val/test
    labelprep.report(m, html="report.html")

Functions are imported on first use, so ``import labelprep`` and ``labelprep --help`` stay fast.
"""

from __future__ import annotations

import importlib

__version__ = "0.3.0"

# public name -> module that defines it; module names differ from function names so that
# importing a submodule never shadows the function of the same name in this namespace
_EXPORTS = {
    "scan": "scanner",
    "check": "checks",
    "group": "clusters",
    "verified_links": "clusters",
    "split": "splits",
    "split_summary": "splits",
    "diagnose_split": "split_diagnosis",
    "audit": "audits",
    "report": "reports",
    "export": "exports",
    "prepare": "pipeline",
    "make_demo": "demo",
    "read_manifest": "manifest:read",
    "write_manifest": "manifest:write",
    "LabelprepError": "errors",
    "InputError": "errors",
    "ParameterError": "errors",
    "OutputExistsError": "errors",
    "GateFailed": "errors",
}

__all__ = sorted(_EXPORTS) + ["__version__"]


def __getattr__(name: str):
    target = _EXPORTS.get(name)
    if target is None:
        raise AttributeError(f"module 'labelprep' has no attribute {name!r}")
    module_name, _, attr = target.partition(":")
    module = importlib.import_module(f".{module_name}", __name__)
    value = getattr(module, attr or name)
    globals()[name] = value
    return value


def __dir__():
    return __all__

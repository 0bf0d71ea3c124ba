"""robustgmm: audit how robust a dynamic panel GMM result is.

The public interface, in the order of the pipeline (model file → spec → panel →
fit or audit → audit folder → report)::

    import robustgmm as rg
    spec = rg.read_model("model.toml")
    result = rg.fit(spec, rg.load_panel(spec))
    folder = rg.write_audit(rg.audit(spec, jobs=2), "audit_out")
    rg.build_report(folder)
    sim = rg.run_simulation(spec, reps=200, jobs=2)   # the grid in a calibrated world
    rg.write_simulation(sim, "simulation_out")

Names are imported on first use, so ``import robustgmm`` stays cheap (the command
line imports only what a command needs).
"""
from __future__ import annotations

import sys
import types

__version__ = "0.1.0"


def _load(name: str):
    """The object behind a public name (plain imports: no dynamic import machinery)."""
    if name in ("read_model", "spec_from_dict"):
        from . import modelfile as module
    elif name == "Spec":
        from . import spec as module
    elif name == "load_panel":
        from . import data as module
    elif name in ("fit", "FitResult"):
        from . import core as module
    elif name == "audit":  # robustgmm.audit is a subpackage too: take its function
        from .audit import audit
        return audit
    elif name == "AuditResult":
        from .audit import AuditResult
        return AuditResult
    elif name == "write_audit":
        from .audit import write_audit
        return write_audit
    elif name == "build_report":
        from . import report as module
    elif name == "run_demo":
        from . import demo as module
    elif name in ("run_simulation", "write_simulation", "Simulation"):
        from .montecarlo import replicate as module
        if name == "run_simulation":
            return module.simulate
    else:
        raise AttributeError(f"module 'robustgmm' has no attribute {name!r}")
    return getattr(module, name)


__all__ = ["read_model", "spec_from_dict", "Spec", "load_panel", "fit", "FitResult",
           "audit", "AuditResult", "write_audit", "build_report", "run_demo",
           "run_simulation", "write_simulation", "Simulation"]


def __getattr__(name: str):
    value = _load(name)
    globals()[name] = value  # later look-ups skip this function
    return value


def __dir__():
    return sorted(set(globals()) | set(__all__))


class _Package(types.ModuleType):
    """The package module. ``robustgmm.audit`` is both a subpackage and the public
    function of that name; importing the subpackage makes the import system bind the
    module to the package attribute, which would make ``robustgmm.audit`` change
    meaning once anything imported it. The function wins: import the subpackage's
    contents with ``from robustgmm.audit import ...``."""

    def __setattr__(self, name, value):
        if (name in __all__ and isinstance(value, types.ModuleType)
                and value.__name__ == f"{self.__name__}.{name}"):
            value = getattr(value, name)
        super().__setattr__(name, value)


sys.modules[__name__].__class__ = _Package

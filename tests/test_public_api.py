"""The package's public surface (robustgmm.__all__) is pinned: adding or removing a
name is a decision, made here and in the README's Python API section."""
from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import robustgmm

PUBLIC = ["read_model", "spec_from_dict", "Spec", "load_panel", "fit", "FitResult",
          "audit", "AuditResult", "write_audit", "build_report", "run_demo",
          "run_simulation", "write_simulation", "Simulation"]


def test_all_is_pinned_and_every_name_resolves():
    assert robustgmm.__all__ == PUBLIC
    from robustgmm.audit import AuditResult, audit, write_audit
    from robustgmm.core import FitResult, fit
    from robustgmm.data import load_panel
    from robustgmm.demo import run_demo
    from robustgmm.modelfile import read_model, spec_from_dict
    from robustgmm.report import build_report
    from robustgmm.spec import Spec
    from robustgmm.montecarlo import Simulation, simulate, write_simulation
    for name, obj in [("read_model", read_model), ("spec_from_dict", spec_from_dict),
                      ("Spec", Spec), ("load_panel", load_panel), ("fit", fit),
                      ("FitResult", FitResult), ("audit", audit), ("AuditResult", AuditResult),
                      ("write_audit", write_audit), ("build_report", build_report),
                      ("run_demo", run_demo), ("run_simulation", simulate),
                      ("write_simulation", write_simulation), ("Simulation", Simulation)]:
        assert getattr(robustgmm, name) is obj, name
    assert set(PUBLIC) <= set(dir(robustgmm))


def test_unknown_names_are_attribute_errors():
    import pytest
    with pytest.raises(AttributeError, match="no attribute 'nothing'"):
        robustgmm.nothing  # noqa: B018


def test_import_is_cheap():
    # importing the package loads none of the heavy layers
    code = ("import sys, robustgmm; print(sorted(m for m in ('pandas', 'numpy', 'scipy', "
            "'matplotlib', 'robustgmm.core', 'robustgmm.audit') if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True,
                         cwd=Path(robustgmm.__file__).parents[1])
    assert out.stdout.strip() == "[]"


def test_readme_api_section_uses_the_public_names():
    readme = (Path(robustgmm.__file__).parents[1] / "README.md").read_text()
    section = readme.split("## Python API", 1)[1].split("\n## ", 1)[0]
    assert "import robustgmm as rg" in section
    for name in PUBLIC:
        assert f"rg.{name}" in section, name

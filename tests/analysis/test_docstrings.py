"""Public functions of the analysis library document themselves in numpydoc sections.

The convention is numpydoc's (Parameters, Returns, Raises, References; numpydoc.readthedocs.io, "Style
guide"). The modules listed are held to it; add a module once its public functions carry the sections.
"""

from __future__ import annotations

import importlib
import inspect

import pytest

DOCUMENTED = ["analysis.conditioning", "analysis.severity", "analysis.result_compat", "analysis.quality",
              "analysis.validate"]
FUNCTIONS = ["analysis.pipeline.analyze_record", "analysis.window.threshold_amplitude",
             "analysis.window.threshold_margin"]


def _public_functions(module_name: str):
    module = importlib.import_module(module_name)
    for name, fn in inspect.getmembers(module, inspect.isfunction):
        if not name.startswith("_") and fn.__module__ == module_name:
            yield f"{module_name}.{name}", fn


def _resolve(path: str):
    module, name = path.rsplit(".", 1)
    return getattr(importlib.import_module(module), name)


@pytest.mark.parametrize("path", [p for m in DOCUMENTED for p, _ in _public_functions(m)] + FUNCTIONS)
def test_public_function_has_numpydoc_sections(path):
    doc = inspect.getdoc(_resolve(path)) or ""
    lines = [line.strip() for line in doc.splitlines()]
    for section in ("Parameters", "Returns"):
        i = lines.index(section) if section in lines else -1
        assert i > 0 and lines[i + 1].startswith("---"), f"{path}: no {section} section"
    params = [p for p in inspect.signature(_resolve(path)).parameters if p not in ("self", "cls")]
    documented = doc.split("Parameters", 1)[1].split("Returns", 1)[0]
    missing = [p for p in params if p not in documented]
    assert not missing, f"{path}: parameters not documented: {missing}"

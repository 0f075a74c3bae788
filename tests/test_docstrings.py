"""Every runnable example in attnscope's docstrings runs and prints what it says (docs that cannot rot)."""

from __future__ import annotations

import doctest
import importlib
import pkgutil

import pytest

import attnscope

MODULES = sorted(m.name for m in pkgutil.walk_packages(attnscope.__path__, "attnscope.")
                 if not m.name.endswith("__main__"))


@pytest.mark.parametrize("name", MODULES)
def test_docstring_examples(name, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)  # examples that write files write them here
    module = importlib.import_module(name)
    result = doctest.testmod(module, optionflags=doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE, verbose=False)
    assert result.failed == 0, f"{result.failed} of {result.attempted} examples failed in {name}"

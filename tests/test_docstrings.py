"""Every runnable example in the package's docstrings runs, and gives what it shows."""

from __future__ import annotations

import doctest
import importlib
import pkgutil

import pytest

import simulators
import watchdog_edge


def _modules() -> list[str]:
    names = []
    for pkg in (watchdog_edge, simulators):
        names.append(pkg.__name__)
        names += [m.name for m in pkgutil.walk_packages(pkg.__path__, pkg.__name__ + ".")]
    return sorted(names)


MODULES = _modules()


def test_the_walk_finds_the_core_and_the_adapters():
    assert {"watchdog_edge.core.monitor", "watchdog_edge.core.checks.gap", "watchdog_edge.agent.store"} <= set(MODULES)


@pytest.mark.parametrize("name", MODULES)
def test_docstring_examples_run(name, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)  # an example that writes a file writes it here
    module = importlib.import_module(name)
    finder = doctest.DocTestFinder(exclude_empty=True)
    runner = doctest.DocTestRunner(optionflags=doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE)
    for test in finder.find(module, name):
        runner.run(test)
    result = runner.summarize(verbose=False)
    assert result.failed == 0, f"{result.failed} of {result.attempted} examples in {name} failed (see the output above)"

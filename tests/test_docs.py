"""Documentation that runs: the core's docstring examples and the README's Python sample."""

from __future__ import annotations

import doctest
import importlib
import pkgutil
import re
from pathlib import Path

import pytest

import trialdesk.core

README = Path(__file__).parents[1] / "README.md"
MODULES = sorted(info.name for info in pkgutil.iter_modules(trialdesk.core.__path__))


@pytest.mark.parametrize("name", ["__init__", *MODULES])
def test_docstring_examples_run(name):
    module = trialdesk.core if name == "__init__" else importlib.import_module(
        f"trialdesk.core.{name}")
    result = doctest.testmod(module, optionflags=doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE)
    assert result.failed == 0


def test_readme_python_sample_runs():
    blocks = re.findall(r"```python\n(.*?)```", README.read_text(encoding="utf-8"), flags=re.S)
    assert blocks
    for block in blocks:
        exec(compile(block, "README.md", "exec"), {})


def test_readme_quick_start_has_exactly_two_commands():
    text = README.read_text(encoding="utf-8")
    quick = text.split("## Quick start", 1)[1].split("\n## ", 1)[0]
    commands = re.findall(r"```sh\n(.*?)```", quick, flags=re.S)
    assert len(commands) == 2 and all(c.count("\n") == 1 for c in commands)

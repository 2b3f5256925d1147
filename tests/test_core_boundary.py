"""The core never imports Qt, pyqtgraph or the desktop package."""

from __future__ import annotations

import subprocess
import sys
import textwrap


def test_core_runs_with_qt_blocked():
    # Import every core module and run the demo analysis in a fresh interpreter in which any
    # import of PySide6, shiboken6, pyqtgraph or trialdesk.desktop fails.
    script = textwrap.dedent(
        """
        import importlib, pkgutil, sys

        class Block:
            def find_spec(self, name, path=None, target=None):
                root = name.split(".")[0]
                if root in ("PySide6", "shiboken6", "pyqtgraph") or name.startswith(
                        "trialdesk.desktop"):
                    raise ImportError(f"blocked: {name}")
                return None

        sys.meta_path.insert(0, Block())
        import trialdesk.core as core
        for info in pkgutil.iter_modules(core.__path__):
            importlib.import_module(f"trialdesk.core.{info.name}")
        from trialdesk.core import DEMO_SETTINGS, analyze, demo_fieldbook_path, read_fieldbook
        analyze(read_fieldbook(demo_fieldbook_path()), DEMO_SETTINGS)
        loaded = [m for m in sys.modules if m.split(".")[0] in ("PySide6", "pyqtgraph")]
        assert not loaded, loaded
        print("ok")
        """
    )
    done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True,
                          timeout=120)
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip().endswith("ok")

"""The package face: every name in ``__all__`` resolves, nothing loads eagerly."""

from __future__ import annotations

import subprocess
import sys

import report_kit


def test_every_public_name_resolves():
    for name in report_kit.__all__:
        assert getattr(report_kit, name) is not None, name


def test_former_module_names_still_resolve():
    assert report_kit.estimate.neyman_difference is report_kit.neyman_difference
    assert report_kit.designs.draw_assignment is report_kit.draw_assignment


def test_import_is_lazy():
    code = "import sys, report_kit; print(any(m.startswith('report_kit.') for m in sys.modules))"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"

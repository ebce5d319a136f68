"""The wheel is enough: build it, install it into a fresh virtual environment, run an example to a PDF.

The new environment holds report-kit from the wheel only; the dependencies are
made visible through a ``.pth`` file naming the running interpreter's
site-packages (a directory listed in a ``.pth`` file is added to ``sys.path``
but its own ``.pth`` files, such as an editable install's finder, are not run),
so ``import report_kit`` must come from the wheel, also in the notebook's kernel.
Runs in ``make test``.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import sysconfig
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
#: What the wheel is built from: the package, the templates, the build metadata.
SOURCES = ("pyproject.toml", "README.md", "report_kit", "report_templates")

pytestmark = pytest.mark.wheel


def _run(args: list, *, cwd: Path, env: dict | None = None) -> subprocess.CompletedProcess:
    done = subprocess.run([str(a) for a in args], cwd=cwd, env=env, capture_output=True, text=True, check=False)
    assert done.returncode == 0, f"{args[:4]} failed:\n{done.stdout[-2000:]}\n{done.stderr[-4000:]}"
    return done


def _build_wheel(tmp: Path) -> Path:
    source = tmp / "source"
    source.mkdir()
    for name in SOURCES:
        if (ROOT / name).is_dir():
            shutil.copytree(ROOT / name, source / name, ignore=shutil.ignore_patterns("__pycache__", "*.pyc"))
        else:
            shutil.copy2(ROOT / name, source / name)
    _run([sys.executable, "-m", "pip", "wheel", "--quiet", "--no-deps", "--no-build-isolation", "--no-index",
          "--wheel-dir", tmp / "dist", source], cwd=tmp)
    (wheel,) = (tmp / "dist").glob("report_kit-*.whl")
    return wheel


def _fresh_venv(tmp: Path, wheel: Path) -> Path:
    venv = tmp / "venv"
    _run([sys.executable, "-m", "venv", "--without-pip", venv], cwd=tmp)
    python = venv / "bin" / "python"
    _run([sys.executable, "-m", "pip", "--python", python, "install", "--quiet", "--no-deps", "--no-index", wheel],
         cwd=tmp)
    site = Path(_run([python, "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"],
                     cwd=tmp).stdout.strip())
    deps = {sysconfig.get_paths()["purelib"], sysconfig.get_paths()["platlib"]}
    (site / "report_kit_test_deps.pth").write_text("\n".join(sorted(deps)) + "\n", encoding="utf-8")
    return venv


def test_wheel_installs_and_runs_an_example_to_pdf(tmp_path):
    wheel = _build_wheel(tmp_path)
    venv = _fresh_venv(tmp_path, wheel)
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "PYTHONHOME")}
    # The dependencies' data files (nbconvert's page templates) sit under their own prefix; a
    # normal install puts them under the new one. Kernelspecs found there are not used: report-kit
    # starts its kernel with its own interpreter.
    env["JUPYTER_PATH"] = os.pathsep.join([str(Path(sys.prefix) / "share" / "jupyter"),
                                           *filter(None, [os.environ.get("JUPYTER_PATH")])])
    work = tmp_path / "work"
    work.mkdir()
    project = shutil.copytree(ROOT / "projects" / "quiet-hours", work / "quiet-hours",
                              ignore=shutil.ignore_patterns("runs"))

    where = _run([venv / "bin" / "python", "-c", "import report_kit; print(report_kit.__file__)"],
                 cwd=work, env=env).stdout.strip()
    assert Path(where).resolve().is_relative_to(venv.resolve()), where
    templates = _run([venv / "bin" / "python", "-c",
                      "from report_kit.report.notebooks import template_paths; print(len(template_paths()))"],
                     cwd=work, env=env).stdout.strip()
    assert int(templates) == len(list((ROOT / "report_templates").glob("[0-9][0-9]_*.py")))

    _run([venv / "bin" / "report-kit", "run", project.name], cwd=work, env=env)
    (run_dir,) = (project / "runs").iterdir()
    assert (run_dir / "report.pdf").stat().st_size > 0
    assert (run_dir / "report.pdf").read_bytes().startswith(b"%PDF")
    executed = (run_dir / "notebooks" / "report.ipynb").read_text(encoding="utf-8")
    assert "report-kit 0." in executed  # the provenance section ran, in a kernel of the new environment

"""Shared pytest fixtures."""

import json
import os
import sys
from pathlib import Path

import pytest

REPO_ROOT = Path(__file__).resolve().parents[1]


# ----------------------------------------------------------------------------- Jupyter
@pytest.fixture(scope="session")
def jupyter_dirs(tmp_path_factory):
    """Isolated Jupyter folders, and a ``python3`` kernel that runs this very interpreter.

    Returns a dict of environment variables for servers and kernels started by the tests:
    temporary ``JUPYTER_*``/``JUPYTERLAB_*``/``IPYTHONDIR`` folders (so no user or system
    configuration, kernel or workspace leaks in, and nothing is written outside the test's
    temporary folder), and ``PYTHONPATH`` starting with the repository root, so the kernels
    import the dustkit under test. The kernelspec in the temporary data folder points at
    ``sys.executable``; a fresh CI virtual environment therefore behaves like a developer's.
    JupyterLab's news and update checks are switched off in its settings folder.
    """
    root = tmp_path_factory.mktemp("jupyter")
    env = {}
    for var, sub in (
        ("JUPYTER_DATA_DIR", "data"),
        ("JUPYTER_CONFIG_DIR", "config"),
        ("JUPYTER_RUNTIME_DIR", "runtime"),
        ("JUPYTERLAB_SETTINGS_DIR", "lab-settings"),
        ("JUPYTERLAB_WORKSPACES_DIR", "lab-workspaces"),
        ("IPYTHONDIR", "ipython"),
    ):
        folder = root / sub
        folder.mkdir()
        env[var] = str(folder)

    spec = root / "data" / "kernels" / "python3"
    spec.mkdir(parents=True)
    (spec / "kernel.json").write_text(json.dumps({
        "argv": [sys.executable, "-m", "ipykernel_launcher", "-f", "{connection_file}"],
        "display_name": "Python 3 (dustkit tests)",
        "language": "python",
        "metadata": {"debugger": False},
    }))

    news = root / "lab-settings" / "@jupyterlab" / "apputils-extension"
    news.mkdir(parents=True)
    (news / "notification.jupyterlab-settings").write_text(
        json.dumps({"fetchNews": "false", "checkForUpdates": False}))

    old = os.environ.get("PYTHONPATH")
    env["PYTHONPATH"] = os.pathsep.join([str(REPO_ROOT)] + ([old] if old else []))
    env["PYDEVD_DISABLE_FILE_VALIDATION"] = "1"  # quiets a debugger notice in kernel logs
    return env


@pytest.fixture
def jupyter_env(jupyter_dirs, monkeypatch):
    """``jupyter_dirs`` applied to ``os.environ`` for one test (kernels inherit it)."""
    for var, value in jupyter_dirs.items():
        monkeypatch.setenv(var, value)
    monkeypatch.delenv("MPLBACKEND", raising=False)
    return jupyter_dirs


@pytest.fixture(autouse=True)
def _close_figures():
    """Close the figures a test opened, so a long run does not pile them up."""
    yield
    if "matplotlib.pyplot" in sys.modules:
        sys.modules["matplotlib.pyplot"].close("all")

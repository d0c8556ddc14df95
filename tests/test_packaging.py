"""Packaging checks: every folder with an __init__.py ships in the wheel; the import rules hold."""

from __future__ import annotations

import shutil
import subprocess
import sys
import tomllib
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
TOP_FOLDERS = ("solver", "service", "clients", "configs")


def _packaging() -> tuple[list[str], dict[str, str]]:
    data = tomllib.loads((ROOT / "pyproject.toml").read_text())
    setup = data["tool"]["setuptools"]
    return list(setup["packages"]), dict(setup["package-dir"])


def test_every_package_folder_is_listed() -> None:
    # An __init__.py folder missing from `packages` silently drops out of the wheel (common practice:
    # setuptools only ships listed packages when `packages` is explicit).
    packages, package_dir = _packaging()
    listed = {Path(folder) for folder in package_dir.values()}
    found = {
        init.parent.relative_to(ROOT)
        for top in TOP_FOLDERS
        for init in (ROOT / top).rglob("__init__.py")
        if "__pycache__" not in init.parts
    }
    assert found, "no package folders found"
    assert found - listed == set(), f"folders with __init__.py missing from package-dir: {found - listed}"
    for name, folder in package_dir.items():
        assert name in packages, f"{name} has a package-dir entry but is not in packages"
        assert (ROOT / folder / "__init__.py").is_file(), f"{folder} is listed but has no __init__.py"
        assert name == "twistrate." + folder.replace("/", "."), f"{name} does not mirror {folder}"


def test_packages_import_from_the_mapped_folders() -> None:
    import twistrate.clients
    import twistrate.service
    import twistrate.solver

    for module, folder in ((twistrate.solver, "solver"), (twistrate.service, "service"),
                           (twistrate.clients, "clients")):
        assert Path(module.__file__).resolve().parent == ROOT / folder


def test_ruff_clean() -> None:
    # The lint rules include the ban on bare `import solver` (flake8-tidy-imports banned-api).
    ruff = shutil.which("ruff") or str(Path(sys.executable).parent / "ruff")
    result = subprocess.run([ruff, "check", str(ROOT)], capture_output=True, text=True, cwd=ROOT)
    assert result.returncode == 0, result.stdout + result.stderr

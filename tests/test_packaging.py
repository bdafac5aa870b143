"""Packaging: the wheel maps parsers/ and daemon/ into ionwarden.* and carries its data."""

from __future__ import annotations

import subprocess
import sys
import zipfile
from pathlib import Path

import pytest

from .conftest import REPO


@pytest.fixture(scope="module")
def wheel(tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("wheel")
    subprocess.run(
        [
            sys.executable,
            "-m",
            "pip",
            "wheel",
            "--no-deps",
            "--no-build-isolation",
            "-q",
            "-w",
            str(out),
            str(REPO),
        ],
        check=True,
        capture_output=True,
    )
    (whl,) = out.glob("ionwarden-*.whl")
    return whl


@pytest.mark.slow
def test_wheel_maps_packages_into_ionwarden_namespace(wheel: Path) -> None:
    """The wheel installs ionwarden/parsers and ionwarden/daemon, never bare daemon/ or parsers/."""
    names = zipfile.ZipFile(wheel).namelist()
    assert "ionwarden/parsers/__init__.py" in names
    assert "ionwarden/daemon/cli/__init__.py" in names
    assert "ionwarden/parsers/py.typed" in names
    assert "ionwarden/daemon/py.typed" in names
    assert not [n for n in names if n.startswith(("daemon/", "parsers/"))]
    # every source sub-package in the tree is in the wheel (the explicit list in pyproject.toml)
    for init in sorted((REPO / "daemon").rglob("__init__.py")) + sorted(
        (REPO / "parsers").rglob("__init__.py")
    ):
        rel = init.relative_to(REPO).as_posix()
        assert f"ionwarden/{rel}" in names, (
            f"{rel} missing from the wheel: add it to [tool.setuptools] packages"
        )
    for module in sorted((REPO / "daemon").rglob("*.py")) + sorted(
        (REPO / "parsers").rglob("*.py")
    ):
        rel = module.relative_to(REPO).as_posix()
        assert f"ionwarden/{rel}" in names, f"{rel} missing from the wheel"


@pytest.mark.slow
def test_wheel_carries_package_data(wheel: Path) -> None:
    """Bundled demo capture and JSON Schemas ship inside the wheel when present in the tree."""
    names = set(zipfile.ZipFile(wheel).namelist())
    for pattern in ("daemon/data/*.bin", "daemon/data/*.md", "daemon/schemas/*.json"):
        for path in REPO.glob(pattern):
            rel = path.relative_to(REPO).as_posix()
            assert f"ionwarden/{rel}" in names, f"{rel} missing: list it in package-data"


@pytest.mark.slow
def test_wheel_installs_and_imports_in_fresh_venv(wheel: Path, tmp_path: Path) -> None:
    """`pip install` of the wheel into a fresh venv gives importable ionwarden.parsers/.daemon."""
    venv = tmp_path / "venv"
    subprocess.run([sys.executable, "-m", "venv", "--without-pip", str(venv)], check=True)
    py = venv / "bin" / "python"
    site = subprocess.run(
        [str(py), "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"],
        check=True,
        capture_output=True,
        text=True,
    ).stdout.strip()
    # Dependencies come from the test venv (no network needed); ionwarden itself from the wheel only.
    deps = [p for p in sys.path if p.endswith("site-packages")]
    (Path(site) / "deps.pth").write_text("\n".join(deps) + "\n")
    subprocess.run(
        [sys.executable, "-m", "pip", "install", "-q", "--no-deps", "--target", site, str(wheel)],
        check=True,
        capture_output=True,
    )
    code = (
        "import ionwarden.parsers, ionwarden.daemon.cli, sys;"
        "assert ionwarden.parsers.__file__.startswith(sys.argv[1]), ionwarden.parsers.__file__"
    )
    subprocess.run([str(py), "-I", "-c", code, site], check=True, cwd=tmp_path)

"""An installed lotgate (a built wheel, not the source checkout) runs the demo from any folder.

The wheel is built from a copy of the source, installed into a fresh virtual environment whose
dependencies come from the test's own environment through a ``.pth`` line (nothing is
downloaded: the build tools are the test environment's own), and run from a folder outside the repository with the
repository off ``sys.path``. The expected results are the demo's golden copy (tests/golden/demo/).
"""

import os
import shutil
import subprocess
import sys
import sysconfig
from pathlib import Path

import pytest

from tests.golden import capture, differs, read_golden

pytestmark = pytest.mark.slow

REPO = Path(__file__).resolve().parents[1]
SOURCE = ("pyproject.toml", "setup.py", "README.md", "pipeline", "flows", "specs", "schemas")


def _run(args: list, **kwargs) -> subprocess.CompletedProcess:
    done = subprocess.run([str(a) for a in args], capture_output=True, text=True, **kwargs)
    assert done.returncode == 0, f"{args}:\n{done.stdout[-3000:]}\n{done.stderr[-3000:]}"
    return done


@pytest.fixture(scope="module")
def installed(tmp_path_factory) -> Path:
    """A virtual environment holding only the lotgate wheel; its python finds the other packages."""
    base = tmp_path_factory.mktemp("installed")
    source = base / "source"
    source.mkdir()
    for name in SOURCE:
        if (REPO / name).is_dir():
            shutil.copytree(REPO / name, source / name, ignore=shutil.ignore_patterns("__pycache__"))
        else:
            shutil.copy2(REPO / name, source / name)
    _run([sys.executable, "-m", "pip", "wheel", "--no-deps", "--no-build-isolation", "--quiet", "-w", base / "dist", source], timeout=600)
    wheels = list((base / "dist").glob("lotgate-*.whl"))
    assert len(wheels) == 1, wheels
    venv = base / "venv"
    _run([sys.executable, "-m", "venv", "--without-pip", venv], timeout=120)
    python = venv / "bin" / "python"
    _run([sys.executable, "-m", "pip", "--python", python, "install", "--no-deps", "--quiet", wheels[0]], timeout=300)
    site = Path(_run([python, "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"]).stdout.strip())
    (site / "zz-dependencies.pth").write_text(sysconfig.get_paths()["purelib"] + "\n", encoding="utf-8")
    shutil.rmtree(source)
    return venv


def _clean_env() -> dict[str, str]:
    return {k: v for k, v in os.environ.items()
            if k != "PYTHONPATH" and not k.startswith(("LOTGATE_", "PREFECT_API_URL"))}


def test_the_installed_package_is_not_the_checkout(installed, tmp_path):
    done = _run([installed / "bin" / "python", "-c",
                 "import pipeline, sys; from pipeline.records.controlled_files import shipped_folders; "
                 "print(pipeline.__file__); print(shipped_folders().methods); print('\\n'.join(sys.path))"],
                cwd=tmp_path, env=_clean_env())
    package, methods, *path = done.stdout.splitlines()
    assert Path(package).is_relative_to(installed), package
    assert Path(methods).is_relative_to(installed), methods
    assert Path(methods).parts[-3:] == ("shipped", "specs", "methods")
    # The dependencies' site-packages may lie inside the checkout (its .venv); the checkout itself,
    # where the source packages are, must not be on the path.
    assert str(REPO) not in path, path


def test_the_installed_demo_gives_the_golden_results(installed, tmp_path):
    workspace = tmp_path / "plant"
    done = _run([installed / "bin" / "lotgate", "demo", "--workspace", workspace],
                cwd=tmp_path, env=_clean_env(), timeout=900)
    assert "Night of 2026-11-27" in done.stdout
    expected = read_golden()
    certificates = sorted(p.name + ".txt" for p in (workspace / "certificates").glob("*.pdf"))
    assert certificates == sorted(n.removeprefix("documents/") for n in expected if n.endswith("certificate.pdf.txt"))
    if shutil.which("pdftotext") is None:
        pytest.skip("the certificates exist; pdftotext (Debian poppler-utils) is needed to compare their text")
    got = capture(workspace)
    assert sorted(got) == sorted(expected)
    assert [n for n in expected if differs(n, expected[n], got[n])] == []

"""The demo's four nights give the same records, LIMS files and documents as the expected copy.

The expected copy (tests/golden/demo/) was written by the code before the package was
reorganised; a change of structure must leave it as it is. Refresh it (``python tests/golden.py
WORKSPACE`` after ``lotgate demo --workspace WORKSPACE``) only in a commit that changes behaviour
on purpose, and say so in the commit message.
"""

import difflib
import os
import shutil

import pytest

from tests.cli import run_cli
from tests.golden import GOLDEN, capture, differs, read_golden

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def demo_output(tmp_path_factory):
    if shutil.which("pdftotext") is None:
        pytest.skip("pdftotext (Debian package poppler-utils) is not installed; .ci/run installs it")
    root = tmp_path_factory.mktemp("golden") / "plant"
    env = {k: v for k, v in os.environ.items() if not k.startswith(("LOTGATE_", "PREFECT_API_URL"))}
    done = run_cli(["demo", "--workspace", root], env=env, timeout=600)
    assert done.returncode == 0, done.stdout[-2000:] + done.stderr[-2000:]
    return capture(root)


def test_the_same_artefacts_are_written(demo_output):
    expected = read_golden()
    assert expected, f"no expected copy under {GOLDEN}"
    assert sorted(demo_output) == sorted(expected)


@pytest.mark.parametrize("group", ["store", "lims", "documents", "quarantine", "files.txt"])
def test_each_artefact_is_unchanged(demo_output, group):
    expected = read_golden()
    names = sorted(n for n in expected if n == group or n.startswith(group + "/"))
    assert names, f"the expected copy has nothing under {group}"
    differing = []
    for name in names:
        if differs(name, expected[name], demo_output.get(name)):
            diff = difflib.unified_diff(expected[name].splitlines(), (demo_output.get(name) or "").splitlines(),
                                        "expected/" + name, "now/" + name, lineterm="", n=1)
            differing.append("\n".join(list(diff)[:40]))
    assert not differing, f"{len(differing)} of {len(names)} differ:\n" + "\n\n".join(differing[:5])

"""The README promises two set-up commands; CI must run exactly the test one."""

import re
import subprocess
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
README = (ROOT / "README.md").read_text()


def readme_test_command() -> str:
    block = README.split("<!-- test-command -->", 1)[1].split("<!-- /test-command -->", 1)[0]
    match = re.search(r"```sh\n(.*?)\n```", block, re.S)
    assert match, "README test-command block has no sh code block"
    return match.group(1).strip()


def test_readme_starts_with_the_job_paragraph():
    body = README.split("\n", 1)[1].strip()
    first = body.split("\n\n", 1)[0]
    assert "DICOM" in first and "diastolic function" in first
    assert "qualified reader" in first  # the caution is part of the job statement


def test_ci_runs_exactly_the_readme_test_command():
    # .ci/run extracts the block with sed; run that extraction and compare.
    script = (ROOT / ".ci/run").read_text()
    extraction = re.search(r"TEST_COMMAND=\$\((.*)\)\n", script).group(1)
    out = subprocess.run(
        ["bash", "-c", extraction], cwd=ROOT, capture_output=True, text=True, check=True
    ).stdout.strip()
    assert out == readme_test_command()
    assert "pytest" in out and "dcmtk" in out


def test_readme_demo_command_uses_the_console_script():
    assert "diastolic-sr demo" in README

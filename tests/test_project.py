"""Project plumbing: the README's commands, CI, packaging and the demo command."""

import json
import re
import subprocess
import sys
import zipfile
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


def _readme_test_command():
    text = (ROOT / "README.md").read_text()
    block = re.search(r"<!-- ventcast-test -->\n```\n(.*?)\n```\n<!-- /ventcast-test -->", text, re.S)
    assert block, "README.md must mark its test command with ventcast-test markers"
    lines = [ln for ln in block.group(1).splitlines() if ln.strip()]
    assert len(lines) == 1
    return lines[0]


def test_ci_runs_the_readme_test_command():
    """One source of truth: .ci/run extracts the README's test command and runs it."""
    cmd = _readme_test_command()
    ci = (ROOT / ".ci" / "run").read_text()
    assert "ventcast-test" in ci and 'bash -c "$cmd"' in ci
    extracted = subprocess.run(
        ["bash", "-c", "sed -n '/<!-- ventcast-test -->/,/<!-- \\/ventcast-test -->/p' README.md "
                       "| grep -v '<!--' | grep -v '^```' | sed '/^\\s*$/d'"],
        cwd=ROOT, capture_output=True, text=True, check=True).stdout.strip()
    assert extracted == cmd
    assert "pytest" in cmd


def test_readme_first_paragraph_states_the_job():
    text = (ROOT / "README.md").read_text().split("\n\n")
    first = next(p for p in text if not p.startswith("#"))
    for word in ("ventilat", "forecast", "PaO2", "PaCO2"):
        assert word in first


def test_readme_quick_start_has_two_commands():
    text = (ROOT / "README.md").read_text()
    quick = text.split("## Quick start", 1)[1].split("\n## ", 1)[0]
    commands = re.findall(r"```\n(.*?)\n```", quick, re.S)
    assert len(commands) == 2


def test_wheel_ships_resources(tmp_path):
    """Architecture pitfall: resources must be inside the built distribution, not only in a checkout."""
    out = subprocess.run([sys.executable, "-m", "pip", "wheel", "--no-deps", "-q",
                          "-w", str(tmp_path), str(ROOT)], capture_output=True, text=True)
    assert out.returncode == 0, out.stderr[-2000:]
    wheel = next(tmp_path.glob("ventcast-*.whl"))
    names = zipfile.ZipFile(wheel).namelist()
    assert "resources/walkthroughs/hypoxaemia-needs-peep.walkthrough.json" in names
    assert "resources/schema/walkthrough.schema.json" in names
    for demo in ("ards-moderate", "copd-trapping", "postop-wean", "refractory-shunt"):
        assert f"resources/demo/{demo}.ventcast.json" in names
    assert "resources/schema/case.schema.json" in names
    assert "physiology/gasexchange/compartments.py" in names
    assert "physiology/planning/search.py" in names and "app/window.py" in names


def _ventcast(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "app.cli", *args], capture_output=True, text=True,
                          cwd=cwd or ROOT)


def test_demo_lists_cases_with_caution():
    out = _ventcast("demo")
    assert out.returncode == 0, out.stderr
    assert "ards-moderate" in out.stdout and "not a medical device" in out.stdout.splitlines()[-1]


def test_demo_json_and_out(tmp_path):
    out = _ventcast("demo", "--format", "json")
    data = json.loads(out.stdout)
    bedside = data["demo_cases"]["ards-moderate"]["bedside"]
    assert bedside["berlin_category"] == "moderate"
    assert bedside["pf_ratio_mmhg"] == pytest.approx(68 / 0.6)
    assert "caution" in data
    out = _ventcast("demo", "--out", str(tmp_path / "cases"))
    assert out.returncode == 0
    from app import casefile
    for name in casefile.DEMO_NAMES:
        case = casefile.load(tmp_path / "cases" / f"{name}.ventcast.json")
        assert case["format"] == "ventcast.case"


def test_unknown_walkthrough_script_exits_2_naming_it():
    out = _ventcast("walkthrough", "script.json", "--headless")
    assert out.returncode == 2
    assert "'script.json' is neither a file nor a built-in walkthrough" in out.stderr
    assert "Traceback" not in out.stderr


def test_readme_screenshot_exists():
    text = (ROOT / "README.md").read_text()
    images = re.findall(r"!\[[^\]]*\]\(([^)]+\.png)\)", text)
    assert images, "the README shows a screenshot of the window"
    for image in images:
        assert (ROOT / image).stat().st_size > 10_000


def test_window_without_a_screen_says_what_to_do():
    import os
    env = {k: v for k, v in os.environ.items() if k not in ("DISPLAY", "WAYLAND_DISPLAY", "QT_QPA_PLATFORM")}
    out = subprocess.run([sys.executable, "-m", "app.cli"], capture_output=True, text=True, cwd=ROOT, env=env)
    assert out.returncode == 2
    assert "no screen" in out.stderr and "--screenshot" in out.stderr and "Traceback" not in out.stderr

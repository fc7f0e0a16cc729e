"""Project plumbing: the README's commands, CI, packaging and the demo command."""

import json
import os
import re
import sysconfig
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


@pytest.fixture(scope="module")
def wheel(tmp_path_factory):
    folder = tmp_path_factory.mktemp("wheel")
    out = subprocess.run([sys.executable, "-m", "pip", "wheel", "--no-deps", "-q",
                          "-w", str(folder), str(ROOT)], capture_output=True, text=True)
    assert out.returncode == 0, out.stderr[-2000:]
    return next(folder.glob("ventcast-*.whl"))


def test_wheel_installs_one_name(wheel):
    """Issue 20: the wheel puts only `ventcast` (and its dist-info) on the import path."""
    names = zipfile.ZipFile(wheel).namelist()
    top = {n.split("/")[0] for n in names}
    assert top == {"ventcast", f"{wheel.name.split('-')[0]}-{wheel.name.split('-')[1]}.dist-info"}, top
    assert "ventcast/__main__.py" in names
    assert "ventcast/physiology/gasexchange/compartments.py" in names
    assert "ventcast/physiology/planning/search.py" in names and "ventcast/app/window/main.py" in names
    assert not any(n.startswith("ventcast/app/_ventcast") for n in names)
    assert not any("screenshots" in n or "__pycache__" in n for n in names)
    entry_points = zipfile.ZipFile(wheel).read(next(n for n in names if n.endswith("entry_points.txt"))).decode()
    assert "ventcast = ventcast.app.cli:main" in entry_points


def test_wheel_ships_every_resource(wheel):
    """Architecture pitfall: resources must be inside the built distribution, not only in a checkout."""
    names = set(zipfile.ZipFile(wheel).namelist())
    for folder in ("demo", "schema", "walkthroughs", "icons"):
        for path in (ROOT / "resources" / folder).iterdir():
            if path.is_file() and path.suffix in (".json", ".svg"):
                assert f"ventcast/resources/{folder}/{path.name}" in names, path


def test_resources_are_read_through_importlib():
    """Every resource the code reads goes through importlib.resources under the one name."""
    from importlib import resources
    from ventcast.app import casefile, walkthrough
    from ventcast.app.desktop import icon_svg
    for name in casefile.DEMO_NAMES:
        assert resources.files("ventcast.resources.demo").joinpath(f"{name}.ventcast.json").is_file()
        assert casefile.load_demo(name)["format"] == "ventcast.case"
    for name in walkthrough.BUILT_IN:
        assert walkthrough.built_in_text(name)
    assert icon_svg().lstrip().startswith("<?xml") and "<svg" in icon_svg()
    for path in (ROOT / "app").glob("*.py"):
        text = path.read_text()
        assert "open(" not in text or "__file__" not in text, f"{path.name} reads a file next to the code"
        assert 'files("resources' not in text and "files('resources" not in text, path.name


def test_fresh_venv_with_only_the_wheel(wheel, tmp_path):
    """Issue 20 done-when: a venv with only the wheel (and its dependencies) runs the commands; `app` is no name."""
    venv = tmp_path / "venv"
    # The dependencies come from this environment (no network needed): its site-packages is added as a
    # plain path (a .pth line; that folder's own .pth files, the editable install's finder among them, are
    # not run), the wheel is installed into the new venv, and `app`/`physiology`/`resources` are nowhere.
    subprocess.run([sys.executable, "-m", "venv", "--without-pip", str(venv)], check=True)
    py = str(venv / "bin" / "python")
    site = subprocess.run([py, "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"],
                          capture_output=True, text=True, check=True).stdout.strip()
    Path(site, "ventcast-test-deps.pth").write_text(sysconfig.get_paths()["purelib"] + "\n")
    out = subprocess.run([sys.executable, "-m", "pip", "--python", py, "install", "-q", "--no-deps", "--no-index",
                          str(wheel)], capture_output=True, text=True)
    if "no such option: --python" in out.stderr:
        pytest.skip("this pip cannot install into another interpreter")
    assert out.returncode == 0, out.stderr[-2000:]
    env = {k: v for k, v in os.environ.items() if k != "PYTHONPATH"}

    def run(*args):
        return subprocess.run([py, *args], capture_output=True, text=True, cwd=tmp_path, env=env)

    located = run("-c", "import ventcast, ventcast.physiology, sys; print(ventcast.__file__)")
    assert located.returncode == 0, located.stderr
    assert str(venv) in located.stdout, "the installed wheel, not the checkout, is imported"
    assert run("-c", "import app").returncode != 0
    assert run("-c", "import physiology").returncode != 0
    assert run("-c", "import resources").returncode != 0
    demo = run("-m", "ventcast", "demo")
    assert demo.returncode == 0, demo.stderr
    assert "ards-moderate" in demo.stdout and "not a medical device" in demo.stdout
    script = subprocess.run([str(venv / "bin" / "ventcast"), "predict", "--demo", "ards-moderate", "--format", "json"],
                            capture_output=True, text=True, cwd=tmp_path, env=env)
    assert script.returncode == 0, script.stderr
    assert json.loads(script.stdout)["caution"]


def test_desktop_entry_writes_menu_file_and_icon(tmp_path):
    """freedesktop Desktop Entry Specification 1.5: required keys Type, Name, Exec; icon by name."""
    out = _ventcast("desktop-entry", "--prefix", str(tmp_path), "--format", "json")
    assert out.returncode == 0, out.stderr
    written = json.loads(out.stdout)
    desktop = Path(written["desktop_file"])
    assert desktop == tmp_path / "applications" / "ventcast.desktop"
    lines = desktop.read_text().splitlines()
    assert lines[0] == "[Desktop Entry]"
    keys = dict(line.split("=", 1) for line in lines[1:] if line)
    assert keys["Type"] == "Application" and keys["Name"] == "Ventcast" and keys["Icon"] == "ventcast"
    assert keys["Exec"].endswith(" open %f") and "not a medical device" in keys["Comment"]
    assert "MedicalSoftware" in keys["Categories"].split(";")
    icon = tmp_path / "icons" / "hicolor" / "scalable" / "apps" / "ventcast.svg"
    assert icon.read_text().count("<svg") == 1
    assert oct(desktop.stat().st_mode & 0o777) == "0o644"
    # Writing again replaces our own entry; a foreign file of that name is never replaced.
    assert _ventcast("desktop-entry", "--prefix", str(tmp_path)).returncode == 0
    desktop.write_text("[Desktop Entry]\nName=Something else\n")
    again = _ventcast("desktop-entry", "--prefix", str(tmp_path))
    assert again.returncode == 2 and "not written by Ventcast" in again.stderr
    assert desktop.read_text() == "[Desktop Entry]\nName=Something else\n"


def test_desktop_entry_quotes_exec_arguments():
    from ventcast.app.desktop import desktop_entry_text
    text = desktop_entry_text(["/opt/my tools/python", "-m", "ventcast"])
    assert 'Exec="/opt/my tools/python" -m ventcast open %f' in text


def _ventcast(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "ventcast", *args], capture_output=True, text=True,
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
    from ventcast.app import casefile
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
    out = subprocess.run([sys.executable, "-m", "ventcast"], capture_output=True, text=True, cwd=ROOT, env=env)
    assert out.returncode == 2
    assert "no screen" in out.stderr and "--screenshot" in out.stderr and "Traceback" not in out.stderr

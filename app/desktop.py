"""Desktop integration for Linux workstations: a freedesktop ``.desktop`` file and the icon.

``ventcast desktop-entry --user`` writes them under ``$XDG_DATA_HOME`` (``~/.local/share``);
without ``--user`` under ``/usr/local/share`` for every user of the machine (needs root). The
entry starts the window (``ventcast open``) and, given a case file, opens it. Optional: nothing
else in Ventcast needs it.
"""

from __future__ import annotations

import os
import sys
from importlib import resources
from pathlib import Path

from . import CAUTION, version
from .casefile import CaseError, write_atomic

DESKTOP_NAME = "ventcast.desktop"
ICON_NAME = "ventcast"
SYSTEM_PREFIX = Path("/usr/local/share")


def icon_svg() -> str:
    """The Ventcast icon (SVG text), read from the installed package."""
    return resources.files("ventcast.resources.icons").joinpath("ventcast.svg").read_text(encoding="utf-8")


def data_home(user: bool) -> Path:
    """Where the files go: the user's XDG data folder or the machine's /usr/local/share."""
    if not user:
        return SYSTEM_PREFIX
    xdg = os.environ.get("XDG_DATA_HOME", "")
    # The XDG base-directory spec: a relative XDG_DATA_HOME is invalid and is ignored.
    return Path(xdg) if xdg and os.path.isabs(xdg) else Path.home() / ".local" / "share"


def launch_command() -> list[str]:
    """The command that starts this installation's window: its console script, else ``python -m ventcast``."""
    script = Path(sys.executable).parent / "ventcast"
    if script.is_file() and os.access(script, os.X_OK):
        return [str(script.absolute())]
    return [str(Path(sys.executable).absolute()), "-m", "ventcast"]


def _exec_quote(arg: str) -> str:
    """Quote one argument of an Exec key (Desktop Entry Specification 1.5, 'The Exec key')."""
    if not any(c in arg for c in ' \t\n"\'\\><~|&;$*?#()`'):
        return arg
    escaped = arg.replace("\\", "\\\\").replace('"', '\\"').replace("`", "\\`").replace("$", "\\$")
    return f'"{escaped}"'


def desktop_entry_text(command: list[str], icon: str = ICON_NAME) -> str:
    """The ``.desktop`` file (Desktop Entry Specification 1.5) for ``command`` plus ``open %f``."""
    exec_line = " ".join(_exec_quote(a).replace("%", "%%") for a in command) + " open %f"
    return "\n".join([
        "[Desktop Entry]",
        "Type=Application",
        "Version=1.5",
        "Name=Ventcast",
        "GenericName=Ventilation forecast",
        "Comment=Forecast blood gases after a ventilator setting change. Model estimate for decision "
        "support, not a medical device; confirm with measured blood gases.",
        f"Exec={exec_line}",
        f"TryExec={command[0]}",
        f"Icon={icon}",
        "Terminal=false",
        "Categories=Science;MedicalSoftware;",
        "Keywords=ventilation;PEEP;FiO2;blood gas;PaO2;PaCO2;",
        "StartupNotify=true",
        f"X-Ventcast-Version={version()}",
        "",
    ])


def write_desktop_entry(user: bool, prefix: Path | None = None) -> dict:
    """Write the entry and the icon; returns their paths. ``prefix`` overrides the data folder."""
    base = Path(prefix) if prefix is not None else data_home(user)
    apps = base / "applications"
    icons = base / "icons" / "hicolor" / "scalable" / "apps"
    targets = {"desktop_file": apps / DESKTOP_NAME, "icon": icons / f"{ICON_NAME}.svg"}
    for path in targets.values():
        if path.exists() and not path.is_file():
            raise CaseError("--user" if user else "desktop-entry", f"{path} exists and is not a file")
        old = path.read_text(encoding="utf-8", errors="replace") if path.is_file() else ""
        if path.suffix == ".desktop" and old and "X-Ventcast-Version=" not in old:
            raise CaseError("desktop-entry", f"{path} exists and was not written by Ventcast; "
                                             "move it away first")
    try:
        for folder in (apps, icons):
            folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        hint = "" if user else " (without --user the entry is for every user and needs root; try --user)"
        raise CaseError("desktop-entry", f"cannot create {exc.filename}: {exc.strerror}{hint}") from None
    write_atomic(targets["icon"], icon_svg(), mode=0o644)
    write_atomic(targets["desktop_file"], desktop_entry_text(launch_command()), mode=0o644)
    return {k: str(v) for k, v in targets.items()} | {"caution": CAUTION}

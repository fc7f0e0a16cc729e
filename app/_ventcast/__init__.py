"""Ventcast: forecasts what a ventilator setting change will do to a patient's blood gases.

The one name the distribution installs. Its parts:

- ``ventcast.physiology``: the engine (numpy/scipy only, never Qt);
- ``ventcast.app``: the command line, the Qt window, reports and data exchange;
- ``ventcast.resources``: demo cases, JSON schemas, walkthrough scripts and the icon.

In the repository these are the top-level folders ``physiology/``, ``app/`` and ``resources/``;
this file lives in ``app/_ventcast/`` and ``pyproject.toml`` maps the folders under the one name.

Model estimate for decision support, not a medical device: confirm with measured blood gases and
follow local protocols and the judgement of licensed clinicians.
"""


def _version() -> str:
    from importlib.metadata import PackageNotFoundError, version
    try:
        return version("ventcast")
    except PackageNotFoundError:
        return "development"


__version__ = _version()

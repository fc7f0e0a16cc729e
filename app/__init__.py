"""Ventcast faces: the command line, the Qt window, reports and data exchange."""

CAUTION = ("Caution: model estimate for decision support, not a medical device. Confirm with measured "
           "blood gases; follow local protocols and the judgement of licensed clinicians.")

#: 1 kPa = 7.50062 mmHg (760 mmHg = 101.325 kPa; common practice).
MMHG_PER_KPA = 7.50062


def version() -> str:
    """The installed Ventcast version ('development' in a checkout that is not installed)."""
    from importlib.metadata import PackageNotFoundError, version as dist_version
    try:
        return dist_version("ventcast")
    except PackageNotFoundError:
        return "development"

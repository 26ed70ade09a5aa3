"""The version of tamis that runs, for `tamis --version` and the provenance of every build."""

from importlib.metadata import PackageNotFoundError, version


def tool_version() -> str:
    """The installed distribution's version; "0+unknown" when tamis runs from an uninstalled tree."""
    try:
        return version("tamis")
    except PackageNotFoundError:
        return "0+unknown"

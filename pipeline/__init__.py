"""tamis: build compact learned membership filters, and load them in a service."""

from importlib.metadata import PackageNotFoundError, version


def tool_version() -> str:
    """The installed distribution's version; "0+unknown" when tamis runs from an uninstalled tree."""
    try:
        return version("tamis")
    except PackageNotFoundError:
        return "0+unknown"

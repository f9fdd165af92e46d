"""The installed package's version (``0.0.0+source`` when run from a source tree)."""

from importlib.metadata import PackageNotFoundError, version


def package_version() -> str:
    try:
        return version("bucksim")
    except PackageNotFoundError:  # running from a source tree
        return "0.0.0+source"

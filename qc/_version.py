"""The installed version of plexwash (one place, importable without the package's API)."""

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("plexwash")
except PackageNotFoundError:  # running from a source tree that is not installed
    __version__ = "0.0.0+unknown"

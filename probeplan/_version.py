"""The installed version, looked up without loading numpy (``probeplan.__version__``, the
``--version`` option and the provenance of every result file)."""

from __future__ import annotations


def package_version() -> str:
    """The installed probeplan version (``"0.0.0+unknown"`` in a source tree not installed)."""
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version("probeplan")
    except PackageNotFoundError:  # running from a source tree that was not installed
        return "0.0.0+unknown"

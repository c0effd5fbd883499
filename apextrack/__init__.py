"""apextrack: find, track and order primordia on time-lapse stacks of shoot apices, and measure
their phyllotaxis (divergence angles, plastochron, parastichies, irregularities)."""

from importlib.metadata import PackageNotFoundError, version as _version

try:
    __version__ = _version("apextrack")
except PackageNotFoundError:  # running from a source tree
    __version__ = "0.1.0"

from .errors import (AnalysisError, ApextrackError, InputError, MetadataError, OutputError,
                     ResultsError, SettingsError)
from .settings import Settings


def analyse(source=None, **kwargs):
    """Analyse one stack end to end; see :func:`apextrack.pipeline.analyse`."""
    from .pipeline import analyse as _analyse

    return _analyse(source, **kwargs)


__all__ = ["analyse", "Settings", "ApextrackError", "InputError", "MetadataError",
           "SettingsError", "AnalysisError", "OutputError", "ResultsError", "__version__"]

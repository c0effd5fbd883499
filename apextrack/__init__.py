"""apextrack: find, track and order primordia on time-lapse stacks of shoot apices, and measure
their phyllotaxis (divergence angles, plastochron, parastichies, irregularities)."""

from .errors import (AnalysisError, ApextrackError, InputError, MetadataError, OutputError,
                     ResultsError, SettingsError)


def analyse(source=None, **kwargs):
    """Analyse one stack end to end; see :func:`apextrack.pipeline.analyse`."""
    from .pipeline import analyse as _analyse

    return _analyse(source, **kwargs)


def __getattr__(name: str):
    # PEP 562: ``__version__`` (importlib.metadata) and ``Settings`` are loaded on first use, so
    # that commands which need neither (``apextrack --help``) do not pay for them
    if name == "__version__":
        from importlib.metadata import PackageNotFoundError, version

        try:
            value = version("apextrack")
        except PackageNotFoundError:  # running from a source tree
            value = "0.1.0"
    elif name == "Settings":
        from .settings import Settings as value
    else:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    globals()[name] = value
    return value


def __dir__():
    return sorted(set(globals()) | {"__version__", "Settings"})


__all__ = ["analyse", "Settings", "ApextrackError", "InputError", "MetadataError",
           "SettingsError", "AnalysisError", "OutputError", "ResultsError", "__version__"]

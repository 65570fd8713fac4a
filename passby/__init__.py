"""passby: the speed of a passing vehicle from its sound, by the Doppler effect.

The public interface for scripts is :func:`passby.analyze` (see
:mod:`passby.api`); everything it returns is a small frozen dataclass from
:mod:`passby.events`.
"""

__version__ = "0.1.0"

__all__ = ["analyze", "PassEvent", "FileResult", "__version__"]


def __getattr__(name):
    # Imported on first use, so that ``import passby`` stays light.
    if name == "analyze":
        from passby.api import analyze
        return analyze
    if name in ("PassEvent", "FileResult"):
        from passby import events
        return getattr(events, name)
    raise AttributeError(f"module 'passby' has no attribute {name!r}")

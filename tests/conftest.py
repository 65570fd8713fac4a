"""Shared test fixtures and stand-ins."""

import importlib.util
import pathlib
import sys

# The station's stand-ins (a pipeline and a sound card), importable from the
# tests as ``import station_fakes`` under --import-mode=importlib.
_FAKES = pathlib.Path(__file__).with_name("station_fakes.py")
if "station_fakes" not in sys.modules:
    _spec = importlib.util.spec_from_file_location("station_fakes", _FAKES)
    _module = importlib.util.module_from_spec(_spec)
    sys.modules["station_fakes"] = _module
    _spec.loader.exec_module(_module)

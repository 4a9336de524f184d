"""The bundled demo's generator, found through the recording's own metadata (it names the tool that made it),
so tests take node names and the fault story from it instead of writing them out."""

from __future__ import annotations

import functools
import importlib.util
import sys
from pathlib import Path
from types import ModuleType

from watchtower.demo import DEMO_RECORDING
from watchtower.recording import RecordingReader

REPO = Path(__file__).parents[1]


@functools.cache
def generator() -> ModuleType:
    """The module that generated the bundled recording (``demo/<name>.py``), imported once."""
    with RecordingReader(DEMO_RECORDING) as reader:
        path = REPO / reader.meta["tool"]
    spec = importlib.util.spec_from_file_location(path.stem, path)
    assert spec is not None and spec.loader is not None, path
    module = importlib.util.module_from_spec(spec)
    sys.modules[path.stem] = module  # dataclasses look their module up by name
    spec.loader.exec_module(module)
    return module

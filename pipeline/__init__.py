"""shotsmith: new one-shots from your own library, trained on a laptop CPU.

The package is a chain of stages, one module each (see DEVELOPERS.md):
ingest -> spectra/bank -> model/train -> latent -> phase -> render.

The public API is importable from here (``pipeline.generate``, ``pipeline.train_model``
...), but each name is looked up only when first used (module ``__getattr__``, PEP 562),
so importing the package stays cheap: nothing here imports torch. Importing it does
set ``OMP_WAIT_POLICY=PASSIVE`` where unset (:mod:`pipeline.runtime`), so a script that
imports shotsmith before torch trains at a usable speed on a busy machine too.
"""

from __future__ import annotations

import importlib
from typing import Any

from pipeline.runtime import prepare as _prepare

__version__ = "0.1.0"
_prepare()

# public name -> the module that defines it
_API = {
    # in memory (arrays, the sample rate, the items)
    "generate": "pipeline.sounds",
    "interpolate": "pipeline.sounds",
    "vary": "pipeline.sounds",
    "Sounds": "pipeline.sounds",
    # the commands' functions (files)
    "ingest_folder": "pipeline.ingest",
    "train_model": "pipeline.train",
    "generate_sounds": "pipeline.create",
    "interpolate_sounds": "pipeline.create",
    "interpolate_jobs": "pipeline.create",
    "vary_sound": "pipeline.create",
    "inspect_model": "pipeline.inspection",
    "model_info": "pipeline.info",
    "resynth_folder": "pipeline.resynth",
    "export_kit": "pipeline.kit",
    # settings, model files, manifests
    "load_settings": "pipeline.config",
    "Settings": "pipeline.config",
    "RenderSpec": "pipeline.config",
    "load_model_file": "pipeline.modelfile",
    "load_manifest": "pipeline.manifest",
    "ShotsmithError": "pipeline.errors",
}

__all__ = ["__version__", *_API]


def __getattr__(name: str) -> Any:
    module = _API.get(name)
    if module is None:
        raise AttributeError(f"module 'pipeline' has no attribute {name!r}")
    value = getattr(importlib.import_module(module), name)
    globals()[name] = value  # the next lookup is an ordinary attribute
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_API))

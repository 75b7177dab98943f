"""shotsmith: new one-shots from your own library, trained on a laptop CPU.

The package is a chain of stages, one module each (see DEVELOPERS.md):
ingest -> spectra/bank -> model/train -> latent -> phase -> render.
Importing the package is cheap: nothing here imports torch.
"""

__version__ = "0.1.0"

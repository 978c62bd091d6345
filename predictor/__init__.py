"""quaywatch tide science: harmonic prediction and analysis (pure computation).

Public API::

    from predictor import TideModel, harmonic_fit

Output of this package is an automated, unofficial aid: official predictions,
warnings and the local authorities come first.
"""
from __future__ import annotations

__all__ = ["TideModel", "harmonic_fit"]


def __getattr__(name):
    # Imported lazily so the light modules (astro, constituents, nodal) load fast
    # and so each part can be used while the others are still being written.
    if name == "TideModel":
        from predictor.model import TideModel

        return TideModel
    if name == "harmonic_fit":
        from predictor.fit import harmonic_fit

        return harmonic_fit
    raise AttributeError(f"module 'predictor' has no attribute {name!r}")

"""quaywatch tide science: harmonic prediction and analysis (pure computation).

Public API::

    from predictor import TideModel, harmonic_fit, harmonic_fit_chunks

Output of this package is an automated, unofficial aid: official predictions,
warnings and the local authorities come first.
"""
from __future__ import annotations

from predictor.fit import harmonic_fit, harmonic_fit_chunks
from predictor.model import TideModel

__all__ = ["TideModel", "harmonic_fit", "harmonic_fit_chunks"]

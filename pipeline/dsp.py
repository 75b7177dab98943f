"""Small signal helpers shared by the stages (the audio front end and the renderer)."""

from __future__ import annotations

import numpy as np


def raised_cosine(n: int, *, rising: bool = True) -> np.ndarray:
    """A raised-cosine (half Hann) fade of ``n`` gains, float64.

    Rising: ``sin^2(pi/2 * k / n)`` for ``k = 0 .. n-1``, from exactly 0 to just under 1,
    so the first sample is silent. Falling (``rising=False``): its mirror image, from just
    under 1 down to exactly 0, so the last sample is silent and nothing clicks there.
    """
    up = np.sin(0.5 * np.pi * np.arange(n) / max(n, 1)) ** 2
    return up if rising else up[::-1].copy()

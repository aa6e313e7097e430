"""Real 2-D FFTs for the per-frame path of the registration.

``scipy.fft``'s Python front end (argument checks, normalisation of shapes and axes) costs about 30 µs per call
on this project's machines: a tenth of the 256 x 256 forward transform of every frame, and more than the 64 x 64
inverse transform of the coarse search itself. For C-contiguous arrays whose shapes need no padding or cropping,
these functions call the compiled pocketfft routines that ``scipy.fft`` itself calls, through the module it calls
them from. That module is not public: if it is missing, or does not give ``scipy.fft``'s result on a small check
at import, the public ``scipy.fft`` functions are used instead (same results, a little slower).
``tests/test_registration.py`` compares both functions with ``scipy.fft.rfft2`` and ``scipy.fft.irfft2``.
"""

from __future__ import annotations

import numpy as np
import scipy.fft as sfft

__all__ = ["rfft2", "irfft2", "DIRECT"]


def _load():
    try:
        from scipy.fft._pocketfft import pypocketfft as pp

        x = np.arange(48, dtype=np.float32).reshape(6, 8) ** 1.5
        spec = pp.r2c(x, (0, 1), True, 0, None, 1)
        back = pp.c2r(spec, (0, 1), 8, False, 2, None, 1)
        if (np.allclose(spec, sfft.rfft2(x), rtol=1e-5, atol=1e-3)
                and np.allclose(back, sfft.irfft2(spec, s=(6, 8)), rtol=1e-5, atol=1e-3)):
            return pp
    except Exception:  # a SciPy without this module or with another signature: use the public functions
        pass
    return None


_PP = _load()
#: Whether the compiled routines are called directly (else through ``scipy.fft``).
DIRECT = _PP is not None


def rfft2(x: np.ndarray, workers: int = 1) -> np.ndarray:
    """``scipy.fft.rfft2(x, workers=workers)`` of a C-contiguous 2-D float32 or float64 array."""
    if _PP is not None:
        return _PP.r2c(x, (0, 1), True, 0, None, workers)
    return sfft.rfft2(x, workers=workers)


def irfft2(spec: np.ndarray, shape: tuple[int, int], workers: int = 1) -> np.ndarray:
    """``scipy.fft.irfft2(spec, s=shape, workers=workers)`` of a C-contiguous half spectrum of exactly
    ``(shape[0], shape[1] // 2 + 1)`` (complex64 or complex128)."""
    if _PP is not None:
        if spec.shape != (shape[0], shape[1] // 2 + 1):
            raise ValueError(f"half spectrum of shape {spec.shape} does not fit an output of {shape}")
        return _PP.c2r(spec, (0, 1), shape[1], False, 2, None, workers)
    return sfft.irfft2(spec, s=shape, workers=workers)

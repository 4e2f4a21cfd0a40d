"""Ramp filters for filtered back projection, with apodization windows.

The ramp is built from the band-limited spatial kernel of Kak & Slaney
(Chapter 3, Eq. 61), sampled at the radial spacing ``tau``::

    h(0)      = 1 / (4 tau^2)
    h(n tau)  = 0                      n even, n != 0
    h(n tau)  = -1 / (n^2 pi^2 tau^2)  n odd

and only then Fourier transformed (after zero padding to at least twice
the projection length, so the circular convolution of the FFT equals the
linear one). Sampling ``|f|`` directly in frequency would set the DC term
to zero and give the cupping/offset error that Kak & Slaney point out; the
spatial kernel has the right small positive DC value for a finite kernel.

Windows multiply the ramp; ``f_c = cutoff * Nyquist`` and every window is 0
above ``f_c`` (references.md section 5):

=============  ================================
ramp           1
shepp-logan    sinc(f / (2 f_c))
cosine         cos(pi f / (2 f_c))
hamming        0.54 + 0.46 cos(pi f / f_c)
hann           0.5 + 0.5 cos(pi f / f_c)
=============  ================================

References
----------
A. C. Kak and M. Slaney, *Principles of Computerized Tomographic Imaging*,
IEEE Press 1988 (SIAM Classics in Applied Mathematics 33, 2001), ch. 3.
L. A. Shepp and B. F. Logan, "The Fourier reconstruction of a head
section", IEEE Trans Nucl Sci 21(3):21-43, 1974.
"""

from __future__ import annotations

import numpy as np

from ..errors import TwinrayInputError

FILTERS = ("ramp", "shepp-logan", "cosine", "hamming", "hann")


def ramp_kernel(half_length: int, tau_mm: float) -> np.ndarray:
    """The spatial ramp kernel h(n tau) for n = -half_length .. half_length.

    Parameters
    ----------
    half_length : int
    tau_mm : float
        Sample spacing, mm.

    Returns
    -------
    ndarray, shape (2*half_length + 1,)
        Kernel values, 1/mm^2 (index ``half_length`` is n = 0).

    References
    ----------
    Kak & Slaney (1988), ch. 3, Eq. 61.
    """
    n = np.arange(-half_length, half_length + 1)
    h = np.zeros(n.shape, dtype=np.float64)
    h[half_length] = 1.0 / (4.0 * tau_mm ** 2)
    odd = (n % 2) != 0
    h[odd] = -1.0 / (n[odd] ** 2 * np.pi ** 2 * tau_mm ** 2)
    return h


def window(name: str, freq: np.ndarray, cutoff_freq: float) -> np.ndarray:
    """Apodization window ``H(f)/|f|`` at frequencies ``freq`` (same unit as ``cutoff_freq``)."""
    a = np.abs(np.asarray(freq, dtype=np.float64))
    x = a / cutoff_freq
    if name == "ramp":
        w = np.ones_like(a)
    elif name == "shepp-logan":
        w = np.sinc(x / 2.0)
    elif name == "cosine":
        w = np.cos(np.pi * x / 2.0)
    elif name == "hamming":
        w = 0.54 + 0.46 * np.cos(np.pi * x)
    elif name == "hann":
        w = 0.5 + 0.5 * np.cos(np.pi * x)
    else:
        raise TwinrayInputError(f"unknown filter '{name}'; choose one of {', '.join(FILTERS)}")
    return np.where(a <= cutoff_freq, w, 0.0)


def padded_length(n_radial: int) -> int:
    """FFT length: a power of two of at least twice the projection length."""
    return int(2 ** int(np.ceil(np.log2(max(2 * n_radial, 2)))))


def frequency_response(n_radial: int, tau_mm: float, name: str = "ramp", cutoff: float = 1.0) -> np.ndarray:
    """Filter to multiply the FFT of a zero-padded projection by.

    Parameters
    ----------
    n_radial : int
        Number of (uniform) radial samples of a projection.
    tau_mm : float
        Radial spacing, mm.
    name : {"ramp", "shepp-logan", "cosine", "hamming", "hann"}
    cutoff : float
        Window cutoff as a fraction of the Nyquist frequency 1/(2 tau),
        0 < cutoff <= 1.

    Returns
    -------
    ndarray, shape (padded_length(n_radial),)
        Real response, in 1/mm: the DFT of ``tau * h(n tau)`` (so that the
        discrete convolution approximates the convolution integral) times
        the window.
    """
    if not (0.0 < cutoff <= 1.0):
        raise TwinrayInputError(f"--cutoff must be a fraction of Nyquist in (0, 1], got {cutoff}")
    if name not in FILTERS:
        raise TwinrayInputError(f"unknown filter '{name}'; choose one of {', '.join(FILTERS)}")
    length = padded_length(n_radial)
    half = length // 2
    h = ramp_kernel(half, tau_mm)
    # Circular layout for the FFT: n = 0 .. half-1, then -half .. -1.
    circ = np.concatenate([h[half:2 * half], h[:half]])
    response = np.real(np.fft.fft(circ)) * tau_mm
    freq = np.fft.fftfreq(length, d=tau_mm)
    return response * window(name, freq, cutoff * 0.5 / tau_mm)


def filter_projections(sinogram: np.ndarray, tau_mm: float, name: str = "ramp", cutoff: float = 1.0) -> np.ndarray:
    """Ramp-filter every projection (last axis) of a uniformly sampled sinogram.

    Parameters
    ----------
    sinogram : ndarray, shape (..., radial)
        Line integrals sampled every ``tau_mm`` along the last axis.
    tau_mm, name, cutoff
        As in :func:`frequency_response`.

    Returns
    -------
    ndarray of float64, same shape
        Filtered projections (unit of the input per mm^2).
    """
    n = sinogram.shape[-1]
    response = frequency_response(n, tau_mm, name, cutoff)
    spectrum = np.fft.rfft(sinogram, n=len(response), axis=-1)
    spectrum *= response[: spectrum.shape[-1]]
    return np.fft.irfft(spectrum, n=len(response), axis=-1)[..., :n]

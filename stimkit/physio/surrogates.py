"""Surrogate series and trains for the change-point coincidence null.

What it computes
----------------
- :func:`iaaft` -- iterative amplitude-adjusted Fourier transform surrogate (Schreiber &
  Schmitz 1996): starting from a random permutation, alternately impose the original amplitude
  spectrum and the original values (by rank) until the spectrum changes by less than ``tol``
  (relative) between iterations, the ranks stop changing, or ``max_iter`` is reached; it ends
  with the rank step, so the surrogate holds exactly the original values. It keeps the value
  distribution and (to within the iteration's error) the power spectrum, hence the
  autocorrelation; it destroys any alignment of real level shifts with the music. It assumes
  stationarity (Schreiber & Schmitz 2000; Lancaster et al. 2018).
- :func:`phase_randomised` -- the Fourier-transform surrogate (Theiler et al. 1992): spectrum
  and mean kept exactly, values Gaussianised.
- :func:`shift_train` -- a train of event times rotated by ``u`` on the concatenated Omega axis
  (trains are shifted, never raw series: a wrapped series gains a jump at the wrap point).

References
----------
Schreiber, T., & Schmitz, A. (1996). Improved surrogate data for nonlinearity tests. PRL 77,
635-638. Schreiber, T., & Schmitz, A. (2000). Surrogate time series. Physica D 142, 346-382.
Theiler, J., et al. (1992). Testing for nonlinearity in time series: the method of surrogate
data. Physica D 58, 77-94. Lancaster, G., et al. (2018). Surrogate data for hypothesis testing
of physical systems. Physics Reports 748, 1-60.
"""

from __future__ import annotations

import numpy as np

__all__ = ["iaaft", "phase_randomised", "shift_train"]


def iaaft(x, rng: np.random.Generator, *, max_iter: int = 500, tol: float = 1e-6) -> tuple[np.ndarray, int]:
    """One IAAFT surrogate of ``x`` and the number of iterations used (see module notes)."""
    x = np.asarray(x, dtype=np.float64)
    n = x.size
    sorted_x = np.sort(x)
    amp = np.abs(np.fft.rfft(x))
    norm = float(np.sqrt(np.sum(amp ** 2))) or 1.0
    s = rng.permutation(x)
    order = None
    prev_err = np.inf
    it = 0
    for it in range(1, max_iter + 1):
        spec = np.fft.rfft(s)
        mag = np.abs(spec)
        err = float(np.sqrt(np.sum((mag - amp) ** 2))) / norm
        phase = np.where(mag > 0, spec / np.where(mag > 0, mag, 1.0), 1.0)
        y = np.fft.irfft(amp * phase, n)
        new_order = np.argsort(y, kind="stable")
        s = np.empty(n)
        s[new_order] = sorted_x  # the rank step: the k-th smallest of y gets the k-th smallest value
        if order is not None and np.array_equal(new_order, order):
            break
        if np.isfinite(prev_err) and abs(prev_err - err) <= tol * max(err, 1e-300):
            break
        order = new_order
        prev_err = err
    return s, it


def phase_randomised(x, rng: np.random.Generator) -> np.ndarray:
    """Fourier-transform surrogate: random phases, amplitudes and mean kept (Theiler et al. 1992)."""
    x = np.asarray(x, dtype=np.float64)
    n = x.size
    spec = np.fft.rfft(x)
    ph = np.exp(2j * np.pi * rng.uniform(size=spec.size))
    ph[0] = 1.0  # the mean
    if n % 2 == 0:
        ph[-1] = 1.0  # the Nyquist term stays real
    out = spec * ph
    return np.fft.irfft(out, n)


def shift_train(times, span, u: float) -> np.ndarray:
    """``times`` (inside Omega) rotated by ``u`` seconds on the concatenated axis, sorted."""
    pos = span.to_axis(np.asarray(times, dtype=np.float64))
    pos = pos[np.isfinite(pos)]
    return np.sort(span.from_axis(pos + u))

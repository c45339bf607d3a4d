"""The feature pipeline's own copies of a few reference-library pieces, checked against the
libraries they reproduce (written with numpy so that ``stimkit features`` does not import
librosa or ``scipy.signal``, whose start-up costs more than the analysis of a short file)."""

import numpy as np
import pytest

from stimkit.audio import loudness as L
from stimkit.audio import tonal


@pytest.mark.parametrize("sr,n_fft", [(22050, 2048), (44100, 4096), (16000, 1024)])
def test_chroma_filterbank_is_librosas(sr, n_fft):
    # librosa.filters.chroma (McFee et al. 2015; D. Ellis's chroma matrix), A440, C first
    import librosa

    ref = librosa.filters.chroma(sr=sr, n_fft=n_fft, tuning=0.0, base_c=True)
    got = tonal.chroma_filterbank(sr=sr, n_fft=n_fft)
    assert got.shape == ref.shape and got.dtype == np.float32
    np.testing.assert_allclose(got, ref, rtol=1e-6, atol=1e-9)


def test_tonal_centroid_is_librosas_tonnetz():
    # librosa.feature.tonnetz(chroma=...) (Harte, Sandler & Gasser 2006), frames as columns there
    import librosa

    rng = np.random.default_rng(3)
    ch = rng.random((200, 12))
    ch[5] = 0.0  # an all-zero frame stays zero
    ref = librosa.feature.tonnetz(chroma=ch.T).T
    got = tonal.tonal_centroid(ch)
    np.testing.assert_allclose(got, ref, rtol=1e-12, atol=1e-14)
    assert np.all(got[5] == 0.0)


def test_true_peak_filter_is_scipys_firwin():
    # scipy.signal.firwin, window method with a Kaiser window (beta 8), 48 taps, cut-off at 1/4
    from scipy import signal

    ref = signal.firwin(48, 0.25, window=("kaiser", 8.0)) * 4
    np.testing.assert_allclose(L.true_peak_filter(), ref, rtol=1e-12, atol=1e-15)


def test_k_weighting_kernel_is_sosfilt():
    # the meter's compiled K-weighting loop against scipy.signal.sosfilt (same biquads, state
    # carried across blocks of uneven length)
    from scipy import signal

    fs = 44100
    rng = np.random.default_rng(11)
    x = rng.standard_normal((fs, 2)) * 0.2
    m = L.LoudnessMeter(sample_rate_hz=fs, channels=2, true_peak=False)
    got = []
    zi = np.zeros((2, 2, 2))
    for a, b in ((0, 1000), (1000, 1001), (1001, 30000), (30000, fs)):
        p = np.empty(b - a)
        cmax = np.zeros(-(-(b - a + 11) // 64))
        L._kweight_pass(np.ascontiguousarray(x[a:b]), m._sos, zi, m.weights, p, cmax, 11, 64)
        got.append(p)
    y = signal.sosfilt(L.k_weighting_sos(fs), x, axis=0)
    np.testing.assert_allclose(np.concatenate(got), (y * y).sum(axis=1), rtol=1e-12, atol=1e-18)

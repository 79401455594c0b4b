"""The pose search's real spectra layout against numpy's FFT (reference: ``numpy.fft.rfft`` / ``irfft``).

Real spectra hold A rows: the real parts of the F = A // 2 + 1 rfft bins, then the imaginary parts of bins
1 .. A - F (those of bin 0 and of the Nyquist bin of an even A are zero for real data).  Azimuth lengths
cover the radix-2 path (4 divides A), an even A it does not apply to, and an odd A.
"""
from __future__ import annotations

import numpy as np
import pytest
import torch

from protomine.mine.posesearch import _dft_matrix, _idft_matrix, _object_spectra, complex_spectra, spectrum_rows


def _real_layout(z: np.ndarray, A: int) -> np.ndarray:
    """numpy rfft bins (F, ...) -> the layout's (A, ...) rows, written out from the layout's definition."""
    F = A // 2 + 1
    return np.concatenate([z.real, z.imag[1:A - F + 1]])


@pytest.mark.parametrize("A", [36, 12, 10, 9])
def test_object_spectra_equal_numpy_rfft(A):
    rng = np.random.default_rng(A)
    n, C, R, H = 5, 3, 2, 4
    x = rng.normal(size=(n, C, R, A, H)).astype(np.float32)
    w = (rng.random((n, R, A, H)) * (rng.random((n, R, A, H)) > 0.3)).astype(np.float32)
    got = _object_spectra(torch.from_numpy(x), torch.from_numpy(w), _dft_matrix(A)).numpy()
    # factors [w |x|^2, w, w x_1 .. w x_C], object-major features (C + 2, R, H), azimuth first
    xd, wd = x.astype(np.float64), w.astype(np.float64)
    fac = np.concatenate([(wd * (xd ** 2).sum(1))[:, None], wd[:, None], wd[:, None] * xd], axis=1)
    ref = _real_layout(np.moveaxis(np.fft.rfft(fac, axis=3), 3, 0), A)  # (A, n, C + 2, R, H)
    assert got.shape == (A, n, (C + 2) * R * H)
    np.testing.assert_allclose(got, ref.reshape(A, n, -1), atol=2e-5 * np.abs(ref).max())


@pytest.mark.parametrize("A", [36, 10, 9])
def test_layout_round_trip_and_inverse(A):
    rng = np.random.default_rng(0)
    f = rng.normal(size=(A, 7))
    F, Fc = spectrum_rows(A)
    assert F + Fc == A
    spec = _dft_matrix(A).double() @ torch.from_numpy(f)
    np.testing.assert_allclose(complex_spectra(spec, A).numpy(), np.fft.rfft(f, axis=0), atol=1e-5)
    np.testing.assert_allclose((_idft_matrix(A).double() @ spec).numpy(), f, atol=1e-5)


@pytest.mark.parametrize("A", [36, 10, 9])
def test_gauss_products_give_the_circular_cross_correlation(A):
    # reference: the correlation theorem written with numpy's FFT, corr(s) = sum_f irfft(conj(P_f) O_f)(s) =
    # sum_f sum_j o_f[j] p_f[j - s] (computed directly from that sum, in float64), against the three real products of
    # Gauss's method (_cross_spectra) and the inverse transform of their partial sums (_idft_of_partials)
    from protomine.mine.posesearch import _cross_spectra, _idft_of_partials
    rng = np.random.default_rng(A)
    M, n, f = 3, 4, 5
    p = rng.normal(size=(M, f, A))
    o = rng.normal(size=(n, f, A))
    spec = lambda a: torch.tensordot(_dft_matrix(A), torch.from_numpy(a.astype(np.float32)), dims=([1], [2]))  # noqa: E731
    got = (_idft_of_partials(A) @ _cross_spectra(spec(p), spec(o))).numpy().reshape(A, M, n)
    ref = np.zeros((A, M, n))
    for s in range(A):  # sum_j o[j] p[j - s]
        ref[s] = np.einsum("mfj,nfj->mn", np.roll(p, s, axis=2), o)
    np.testing.assert_allclose(got, ref, atol=1e-4 * np.abs(ref).max())

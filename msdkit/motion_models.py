"""Motion models as MSD laws, and their likelihood for the steps of a track.

The MSD laws (public, in µm²) are the observed ones: positions averaged over the exposure (motion blur) and
carrying Gaussian localisation noise of SD ``sigma_um`` per axis.

The likelihood compares models through the steps (increments) of a track rather than through a fit to its
time-averaged MSD, whose points are strongly correlated. For any motion with stationary increments, the
covariance of the steps follows from the per-axis MSD law M(n) of the observed positions,

    Cov(Δx_k, Δx_{k+τ}) = ½ [M(τ + 1) + M(|τ − 1|) − 2 M(τ)],

and the steps' periodogram has the exact finite-length expectation
E I(ω_k) = Σ_{|τ|<N} (1 − |τ|/N) γ(τ) e^{-i ω_k τ}. The log-likelihood is the debiased Whittle likelihood
(Sykulski et al. 2019), summed over axes, including the zero frequency (whose periodogram is the squared
end-to-end displacement over N, with expectation M(N)/N). A model with a constant velocity (directed motion)
drops the zero frequency instead, which leaves its mean free. Scales (D, K, L²) are profiled out in closed
form; shape parameters (alpha, confinement time, noise ratio) are profiled on grids with parabolic
refinement, so all tracks of one length are evaluated with a few matrix products.

References
----------
A. M. Sykulski, S. C. Olhede, A. P. Guillaumin, J. M. Lilly & J. J. Early, Biometrika 106, 251 (2019),
doi:10.1093/biomet/asy071 (debiased Whittle likelihood).
P. Whittle, J. R. Stat. Soc. B 15, 125 (1953).
A. J. Berglund, Phys. Rev. E 82, 011917 (2010), doi:10.1103/PhysRevE.82.011917 (blur and noise in the MSD).
M. J. Saxton & K. Jacobson, Annu. Rev. Biophys. Biomol. Struct. 26, 373 (1997) (confined and directed MSD).
R. Metzler & J. Klafter, Phys. Rep. 339, 1 (2000) (anomalous diffusion).
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache

import numpy as np

from .errors import expected_got

__all__ = [
    "brownian_msd_um2",
    "fbm_msd_um2",
    "confined_msd_um2",
    "directed_msd_um2",
    "step_autocovariance",
    "expected_periodogram",
]

#: Grids of the profiled shape parameters.
ALPHA_GRID = np.round(np.arange(0.05, 1.951, 0.05), 10)
#: Noise ratio r (noise part of the per-axis MSD over the signal scale), on a grid uniform in
#: u = asinh(r/0.01):
#: fine near 0 and logarithmic beyond; slightly negative values (down to −0.25, where the spectrum stays
#: positive) are allowed so that a small noise level is not biased by the r ≥ 0 boundary (the same reason an
#: MSD fit lets its offset go negative); a negative value may remove at most half of the signal spectrum.
_NOISE_U_STEP = 0.25
NOISE_U_GRID = np.arange(np.arcsinh(-0.25 / 0.01), np.arcsinh(1e3 / 0.01) + 1e-9, _NOISE_U_STEP)
NOISE_RATIO_GRID = 0.01 * np.sinh(NOISE_U_GRID)
_N_TAU = 20
#: Fraction of the steps tapered (half at each end) before the periodogram; see split_cosine_taper.
TAPER_FRACTION = 0.2
#: Odd modes of the exact confined-MSD series kept (k = 1, 3, …, 29); the rest relax within a frame.
_ODD_MODES = np.arange(1, 30, 2, dtype=float)


# ---------------------------------------------------------------------------------------------- MSD laws
def _as_t(t_s) -> np.ndarray:
    t = np.asarray(t_s, dtype=float)
    if np.any(t < 0):
        raise ValueError(expected_got("t_s", ">= 0", t_s, "Lags are non-negative times in seconds."))
    return t


def _blurred_power(n: np.ndarray, alpha: float, e: float) -> np.ndarray:
    """E_v|n+v|^α − E_v|v|^α for v triangular on [−e, e] (exposure e in the units of n), n ≥ e.

    Closed form of the uniform-exposure average of a power-law MSD (for α = 1 it gives n − e/3).
    """
    n = np.asarray(n, dtype=float)
    if e <= 1e-6 * max(1.0, float(np.max(n, initial=1.0))):
        return np.where(n > 0, n**alpha, 0.0)
    a1, a2 = alpha + 1.0, alpha + 2.0
    nn = np.maximum(n, e)
    first = ((nn + e) ** a2 + (nn - e) ** a2 - 2.0 * nn**a2) / (e * e * a1 * a2)
    second = 2.0 * e**alpha / (a1 * a2)
    return np.where(n > 0, first - second, 0.0)


def _blurred_confined(n: np.ndarray, tau: np.ndarray, e: float) -> np.ndarray:
    """Exposure-averaged confined MSD in units of its per-axis plateau; n and tau in frames.

    Exact series for reflecting walls, m(t) = 1 − (96/π⁴) Σ_{k odd} k⁻⁴ exp(−k² π² t / (12 τ)) with
    τ = L²/(12 D); each exponential is averaged over the exposure in closed form.
    Returns an array of shape (tau.size, n.size).
    """
    n0 = np.asarray(n, dtype=float)
    n = np.maximum(n0, e)[None, None, :]  # the closed form holds for n ≥ e; n = 0 is set to 0 below
    tau = np.asarray(tau, dtype=float)[:, None, None]
    k = _ODD_MODES[None, :, None]
    amp = 96.0 / np.pi**4 / k**4
    rate = k * k * np.pi**2 / (12.0 * tau)  # per frame
    if e > 0:
        a = rate * e
        small = a < 1e-4
        a_safe = np.where(small, 1.0, a)
        J = np.where(small, 1.0 - a / 3.0, 2.0 * (a_safe - 1.0 + np.exp(-a_safe)) / a_safe**2)
        # H(a) exp(−rate n) with H(a) = (2 cosh a − 2)/a², written without overflow (n ≥ e so a ≤ rate n)
        decay = np.where(
            small,
            (1.0 + a * a / 12.0) * np.exp(-rate * n),
            (np.exp(a - rate * n) + np.exp(-a - rate * n) - 2.0 * np.exp(-rate * n)) / a_safe**2,
        )
    else:
        J = np.ones_like(rate)
        decay = np.exp(-rate * n)
    # m_b(n) = Σ amp [J − H exp(−rate n)]   (the plateau part cancels between the two exposure averages)
    m = np.sum(amp * (J - decay), axis=1)
    return np.where(n0[None, :] > 0, m, 0.0)


def brownian_msd_um2(t_s, *, D_um2_s, sigma_um=0.0, exposure_s=0.0, n_dims=2) -> np.ndarray:
    """Observed MSD of Brownian motion: 2d [D (t − t_E/3) + σ²] for t ≥ t_E, 0 at t = 0.

    References
    ----------
    A. J. Berglund, Phys. Rev. E 82, 011917 (2010); T. Savin & P. S. Doyle, Biophys. J. 88, 623 (2005).
    """
    t = _as_t(t_s)
    return np.where(t > 0, 2 * n_dims * (D_um2_s * (t - exposure_s / 3.0) + sigma_um**2), 0.0)


def fbm_msd_um2(t_s, *, K_um2_s_alpha, alpha, sigma_um=0.0, exposure_s=0.0, n_dims=2) -> np.ndarray:
    """Observed MSD of fractional Brownian motion, 2d K t^α, averaged over the exposure, plus noise.

    For exposure t_E ≤ t the uniform average gives
    2d K [((t+t_E)^{α+2} + (t−t_E)^{α+2} − 2 t^{α+2}) / (t_E² (α+1)(α+2)) − 2 t_E^α / ((α+1)(α+2))] + 2d σ².

    References
    ----------
    R. Metzler & J. Klafter, Phys. Rep. 339, 1 (2000); A. J. Berglund, Phys. Rev. E 82, 011917 (2010).
    """
    t = _as_t(t_s)
    if exposure_s > 0:
        m = _blurred_power(t / exposure_s, alpha, 1.0) * exposure_s**alpha
    else:
        m = np.where(t > 0, t**alpha, 0.0)
    return np.where(t > 0, 2 * n_dims * (K_um2_s_alpha * m + sigma_um**2), 0.0)


def confined_msd_um2(t_s, *, D_um2_s, box_um, n_dims=2, exact=True) -> np.ndarray:
    """MSD of Brownian motion reflected in a square (cube) of side L, started uniformly inside.

    ``exact=False`` gives the common one-exponential form d (L²/6)(1 − exp(−12 D t / L²)), i.e.
    (L²/3)(1 − exp(−12 D t / L²)) in 2D; ``exact=True`` the reflecting-wall series
    d (L²/6)[1 − (96/π⁴) Σ_{k odd} k⁻⁴ exp(−k² π² D t / L²)]. Both start as 2dDt and level off at d L²/6
    (L²/6 per axis).

    References
    ----------
    M. J. Saxton & K. Jacobson, Annu. Rev. Biophys. Biomol. Struct. 26, 373 (1997).
    """
    t = _as_t(t_s)
    L2 = float(box_um) ** 2
    if not exact:
        return n_dims * L2 / 6.0 * (1.0 - np.exp(-12.0 * D_um2_s * t / L2))
    k = np.arange(1, 400, 2, dtype=float).reshape((-1,) + (1,) * t.ndim)
    s = np.sum(k**-4.0 * np.exp(-(k**2) * np.pi**2 * D_um2_s * t[None] / L2), axis=0)
    return n_dims * L2 / 6.0 * (1.0 - 96.0 / np.pi**4 * s)


def directed_msd_um2(t_s, *, D_um2_s, speed_um_s, n_dims=2) -> np.ndarray:
    """MSD of diffusion plus constant velocity: 2d D t + v² t² (Saxton & Jacobson 1997)."""
    t = _as_t(t_s)
    return 2 * n_dims * D_um2_s * t + float(speed_um_s) ** 2 * t**2


# ------------------------------------------------------------------------------- steps and periodograms
def step_autocovariance(msd_axis: np.ndarray) -> np.ndarray:
    """Autocovariance of the steps from the per-axis MSD of positions at lags 0..N (last axis).

    γ(τ) = ½ [M(τ+1) + M(|τ−1|) − 2 M(τ)] for τ = 0..N−1 (stationary increments).
    """
    M = np.asarray(msd_axis, dtype=float)
    prev = np.concatenate([M[..., 1:2], M[..., :-2]], axis=-1)  # M(|τ−1|)
    return 0.5 * (M[..., 1:] + prev - 2.0 * M[..., :-1])


def split_cosine_taper(n_steps: int, fraction: float = TAPER_FRACTION) -> np.ndarray:
    """Split-cosine-bell (Tukey) taper of length N, normalised to Σ h² = 1.

    ``fraction`` of the points (half at each end) are tapered by a raised cosine; 0 gives the flat
    window 1/√N. A taper that vanishes at the ends removes the boundary term that otherwise couples all
    low-frequency periodogram values of steps whose positions are stationary (immobile or confined
    particles), see Dahlhaus (1988).
    """
    N = int(n_steps)
    h = np.ones(N)
    m = int(np.floor(fraction * N / 2.0))
    if m >= 1:
        ramp = 0.5 * (1.0 - np.cos(np.pi * (np.arange(m) + 0.5) / m))
        h[:m] = ramp
        h[N - m :] = ramp[::-1]
    return h / np.sqrt(np.sum(h * h))


def expected_periodogram(msd_axis: np.ndarray, taper: np.ndarray | None = None) -> np.ndarray:
    """Exact expectation of the (tapered) periodogram of N steps, at ω_k = 2πk/N, k = 0..N//2.

    ``msd_axis`` holds M(0..N) per axis (last axis). The periodogram is |Σ_t h_t Δx_t e^{−iω t}|² with
    taper h (Σ h² = 1; default flat, h = 1/√N), whose expectation is Σ_{|τ|<N} γ(τ) c_h(τ) e^{−iωτ} with
    c_h(τ) = Σ_t h_t h_{t+|τ|}.

    References
    ----------
    Sykulski et al., Biometrika 106, 251 (2019); R. Dahlhaus, Ann. Stat. 16, 808 (1988).
    """
    g = step_autocovariance(msd_axis)
    N = g.shape[-1]
    if taper is None:
        c = 1.0 - np.arange(N) / N
    else:
        f = np.fft.rfft(taper, 2 * N)
        c = np.fft.irfft(f.real**2 + f.imag**2, 2 * N)[:N]
    a = g * c
    return 2.0 * np.fft.rfft(a, axis=-1).real - a[..., :1]


def frequency_weights(n_steps: int) -> np.ndarray:
    """Whittle weights: ½ at frequency 0 and at Nyquist (one real coefficient), 1 elsewhere."""
    w = np.ones(n_steps // 2 + 1)
    w[0] = 0.5
    if n_steps % 2 == 0:
        w[-1] = 0.5
    return w


def _periodograms_with_free_mean(steps: np.ndarray, taper: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """:func:`periodograms` of the steps and of the steps minus their mean, from one set of transforms.

    The transform is linear, so that of (steps − mean) is F − mean · H with H the transform of the taper.
    """
    import scipy.fft  # the same pocketfft transforms as numpy.fft (same numbers), with less overhead per call

    from ._msd_kernels import power_with_free_mean

    T, N, d = steps.shape
    H = np.fft.rfft(taper)
    P = np.empty((T, N // 2 + 1))
    Pd = np.empty((T, N // 2 + 1))
    chunk = max(1, 65536 // max(N * d, 1))
    for a in range(0, T, chunk):
        blk = steps[a : a + chunk].transpose(0, 2, 1)
        F = scipy.fft.rfft(blk * taper, axis=-1)
        # blk.mean(axis=-1), as numpy computes it (sum along the steps' middle axis, then / N), compiled
        mean = _end_to_end(steps[a : a + chunk]) / N
        # Σ_axes |F|² and Σ_axes |F − mean·H|² in one compiled pass (numpy's operations, in order)
        power_with_free_mean(F, mean, H, P[a : a + chunk], Pd[a : a + chunk])
    return P, Pd


def periodograms(steps: np.ndarray, taper: np.ndarray | None = None) -> np.ndarray:
    """Periodogram of each track's steps summed over axes: (n_tracks, N, n_axes) → (n_tracks, N//2 + 1)."""
    T, N, d = steps.shape
    h = np.full(N, 1.0 / np.sqrt(N)) if taper is None else taper
    out = np.empty((T, N // 2 + 1))
    chunk = max(1, 65536 // max(N * d, 1))  # transforms along contiguous rows, a cache-sized block at a time
    for a in range(0, T, chunk):
        F = np.fft.rfft(steps[a : a + chunk].transpose(0, 2, 1) * h, axis=-1)
        out[a : a + chunk] = np.sum(F.real**2 + F.imag**2, axis=1)
    return out


# ----------------------------------------------------------------------------------------- model banks
@dataclass(frozen=True)
class _Bank:
    """Spectral shapes for one track length and exposure ratio."""

    n_steps: int
    weights: np.ndarray  # (F,)
    fbm: np.ndarray  # (A, F): power-law shapes, per-axis MSD = scale × n^α (blurred)
    fbm_msd_end: np.ndarray  # (A,): shape MSD at lag N (for end-to-end variance)
    tau: np.ndarray  # (C,) confinement times, frames
    conf: np.ndarray  # (C, F): confined shapes, per-axis plateau = scale
    noise: np.ndarray  # (F,): noise shape, per-axis MSD = scale × r for n ≥ 1
    taper: np.ndarray  # (N,)


@lru_cache(maxsize=512)
def _bank(n_steps: int, exposure_ratio: float) -> _Bank:
    N = int(n_steps)
    e = float(exposure_ratio)
    n = np.arange(N + 1, dtype=float)
    fbm_msd = np.stack([_blurred_power(n, a, e) for a in ALPHA_GRID])
    tau = np.logspace(np.log10(0.25), np.log10(max(4.0 * N, 20.0)), _N_TAU)
    conf_msd = _blurred_confined(n, tau, e)
    noise_msd = np.where(n > 0, 1.0, 0.0)
    h = split_cosine_taper(N)
    return _Bank(
        n_steps=N,
        weights=frequency_weights(N),
        fbm=expected_periodogram(fbm_msd, h),
        fbm_msd_end=fbm_msd[:, -1],
        tau=tau,
        conf=expected_periodogram(conf_msd, h),
        noise=expected_periodogram(noise_msd, h),
        taper=h,
    )


def _parabola(y0, y1, y2):
    """Vertex offset (in grid steps, within ±½) and value of the parabola through three points.

    The gain over the middle point is capped at the smaller of the two drops to its neighbours: a
    strongly asymmetric profile (e.g. next to the edge of the allowed noise range) is not a parabola, and
    an uncapped vertex would overshoot.
    """
    den = y0 - 2.0 * y1 + y2
    ok = np.isfinite(den) & (den < -1e-12)
    safe = np.where(ok, den, -1.0)
    diff = np.where(ok, y0 - y2, 0.0)
    off = np.where(ok, np.clip(0.5 * diff / safe, -0.5, 0.5), 0.0)
    gain = np.where(ok, -0.25 * diff * off, 0.0)
    cap = np.where(ok, np.minimum(y1 - y0, y1 - y2), 0.0)
    return off, y1 + np.clip(gain, 0.0, np.maximum(cap, 0.0))


def _profile_noise(ll: np.ndarray):
    """Maximise ll (..., R) over the noise-ratio grid with parabolic refinement in u = asinh(r/0.01).

    Returns (max value, refined r, index).
    """
    R = ll.shape[-1]
    idx = np.argmax(ll, axis=-1)
    best = np.take_along_axis(ll, idx[..., None], -1)[..., 0]
    interior = (idx >= 1) & (idx <= R - 2)
    i0 = np.clip(idx - 1, 0, R - 1)
    i2 = np.clip(idx + 1, 0, R - 1)
    y0 = np.take_along_axis(ll, i0[..., None], -1)[..., 0]
    y2 = np.take_along_axis(ll, i2[..., None], -1)[..., 0]
    off, val = _parabola(y0, best, y2)
    best = np.where(interior, val, best)
    u = NOISE_U_GRID[idx] + np.where(interior, off * _NOISE_U_STEP, 0.0)
    return best, 0.01 * np.sinh(u), idx


def _grid_terms(w: np.ndarray, shapes: np.ndarray, noise: np.ndarray, drop_zero: bool):
    """Spectra on shapes × noise ratios: validity (S, R), log-determinant (S, R) and weights / spectrum."""
    spec = shapes[:, None, :] + NOISE_RATIO_GRID[None, :, None] * noise[None, None, :]  # (S, R, F)
    # (S, R): a negative noise ratio may remove at most half of the signal spectrum at any frequency (a
    # spectrum near zero would let one small periodogram value dominate the likelihood)
    valid = np.all(spec >= 0.5 * shapes[:, None, :], axis=-1)
    spec = np.where(valid[..., None], spec, 1.0)
    wq = w.copy()
    if drop_zero:
        wq[0] = 0.0
    logdet = np.log(spec) @ w  # (S, R)
    Q = wq[None, None, :] / spec  # (S, R, F)
    return valid, logdet, Q


#: Elements (tracks x shapes x noise ratios) of the likelihood grid evaluated at a time: large enough for an
#: efficient matrix product, small enough not to hold the grid of every track in memory.
_GRID_CHUNK_ELEMENTS = 1 << 21


def _profile_grid(
    P: np.ndarray, w: np.ndarray, shapes: np.ndarray, noise: np.ndarray, n_axes: int, drop_zero: bool = False
):
    """Profile Whittle log-likelihood on shapes × noise ratios, maximised over the noise ratio.

    P: (T, F) periodograms summed over axes; shapes: (S, F). For each track, shape and noise ratio the
    scale is profiled out in closed form, ll = -n_axes (log det + W log(scale) + W). Since log is
    increasing, the best noise ratio minimises exp((log det - min log det) / W) × scale, so the grid needs
    one matrix product and no logarithms; ll is then evaluated at the best noise ratio and its two
    neighbours (clipped at the grid ends). Tracks go in chunks, so the grid of every track is never held.

    Returns, each of shape (T, S): the refined profile maximum and noise ratio (as :func:`_profile_noise`
    gives them), the grid index of the best noise ratio, and the scale there.
    """
    valid, logdet, Q = _grid_terms(w, shapes, noise, drop_zero)
    S, R, F = Q.shape
    Qt = np.ascontiguousarray(Q.reshape(S * R, F).T)
    W = float(w.sum())
    norm = n_axes * W
    low = np.min(np.where(valid, logdet, np.inf), axis=1, keepdims=True)
    low = np.where(np.isfinite(low), low, 0.0)
    rank = np.where(valid, np.exp((np.where(valid, logdet, 0.0) - low) / W), np.inf)  # (S, R)
    T = P.shape[0]
    ll3 = np.empty((T, S, 3))
    idx = np.empty((T, S), np.int64)
    scale = np.empty((T, S))
    srows = np.arange(S)[None, :]
    step = max(1, _GRID_CHUNK_ELEMENTS // (S * R))
    from ._msd_kernels import best_noise_ratio

    v3 = np.empty((T, S, 3))
    for a in range(0, T, step):
        z = min(T, a + step)
        # scale = max(product / norm, 1e-300), best ratio by argmin(scale x rank) and the scales at it and
        # its neighbours, in one compiled pass over the chunk's products (same operations as numpy's)
        best_noise_ratio(P[a:z] @ Qt, norm, rank, idx[a:z], v3[a:z])
    scale[:] = v3[..., 1]
    for j in range(3):
        r = np.clip(idx + (j - 1), 0, R - 1)
        ok = valid[srows, r]
        with np.errstate(divide="ignore"):
            ll3[..., j] = np.where(ok, -n_axes * (logdet[srows, r] + W * np.log(v3[..., j]) + W), -np.inf)
    best = ll3[..., 1]
    interior = (idx >= 1) & (idx <= R - 2)
    off, val = _parabola(ll3[..., 0], best, ll3[..., 2])
    best = np.where(interior, val, best)
    u = NOISE_U_GRID[idx] + np.where(interior, off * _NOISE_U_STEP, 0.0)
    return best, 0.01 * np.sinh(u), idx, scale


@dataclass(frozen=True)
class StepFits:
    """Per-track profile likelihoods and fitted parameters (frame units; see :func:`fit_step_models`)."""

    ll_immobile: np.ndarray
    ll_brownian: np.ndarray
    ll_fbm: np.ndarray
    ll_confined: np.ndarray
    ll_directed: np.ndarray
    alpha_profile: np.ndarray  # (T, A): profile log-likelihood over ALPHA_GRID
    alpha: np.ndarray
    alpha_lo: np.ndarray
    alpha_hi: np.ndarray
    fbm_scale: np.ndarray  # per-axis MSD at one frame, power-law part (2 K Δt^α)
    fbm_noise: np.ndarray  # per-axis noise MSD 2σ² (same units)
    brown_scale: np.ndarray  # per-axis 2 D Δt
    brown_noise: np.ndarray
    immobile_noise: np.ndarray
    conf_plateau: np.ndarray  # per-axis plateau L²/6
    conf_tau: np.ndarray  # confinement time L²/(12 D), frames
    conf_noise: np.ndarray
    dir_scale: np.ndarray  # per-axis 2 D Δt of the directed model
    dir_noise: np.ndarray
    end_to_end: np.ndarray  # (T, n_axes) sum of steps
    periodogram: np.ndarray | None = None  # (T, N//2 + 1) tapered periodogram summed over axes (bank taper)


def _end_to_end(steps: np.ndarray) -> np.ndarray:
    """Sum of each track's steps, (T, N, d) → (T, d): numpy.sum(steps, axis=1), compiled for d ≥ 2.

    numpy adds along a middle axis term after term; the compiled loop does the same, without numpy's slow
    strided reduction (for d = 1 numpy sums pairwise along the contiguous axis, so it keeps that case).
    """
    if steps.ndim == 3 and steps.shape[2] >= 2 and steps.flags.c_contiguous and steps.dtype == np.float64:
        from ._msd_kernels import sum_middle_axis

        return sum_middle_axis(steps)
    return steps.sum(axis=1)


class Stopped(Exception):
    """Raised by :func:`fit_step_models` when its ``stop`` flag is set (its caller no longer needs it)."""


def _check(stop) -> None:
    if stop is not None and stop.is_set():
        raise Stopped


def fit_step_models(steps: np.ndarray, *, exposure_ratio: float, ci_drop: float = 1.920729,
                    stop=None) -> StepFits:
    """Fit the step models to tracks of one length.

    Parameters
    ----------
    steps : ndarray of shape (n_tracks, n_steps, n_axes), µm (any unit; scales come out in its square)
    exposure_ratio : float
        Exposure over frame interval, in [0, 1].
    ci_drop : float, default=1.92 (χ²₁ 95 % / 2)
        Drop of the profile log-likelihood that bounds the alpha interval.
    stop : threading.Event, optional
        Checked between the heavy parts; when set, :class:`Stopped` is raised (fits started ahead of need,
        see :func:`msdkit.classify.prepare_step_fits`).

    Returns
    -------
    StepFits
    """
    T, N, n_axes = steps.shape
    bank = _bank(N, round(float(exposure_ratio), 4))
    P, Pd = _periodograms_with_free_mean(steps, bank.taper)  # Pd: for the free-mean (directed) model
    _check(stop)
    w = bank.weights
    A = ALPHA_GRID.size

    prof, _, ir_f, sc_f = _profile_grid(P, w, bank.fbm, bank.noise, n_axes)  # (T, A)
    ia = np.argmax(prof, axis=1)
    rows = np.arange(T)
    inner = (ia >= 1) & (ia <= A - 2)
    y0 = prof[rows, np.clip(ia - 1, 0, A - 1)]
    y1 = prof[rows, ia]
    y2 = prof[rows, np.clip(ia + 1, 0, A - 1)]
    off, val = _parabola(y0, y1, y2)
    da = ALPHA_GRID[1] - ALPHA_GRID[0]
    alpha = ALPHA_GRID[ia] + np.where(inner, off * da, 0.0)
    ll_fbm = np.where(inner, val, y1)
    lo, hi = _interval(prof, ll_fbm - ci_drop)
    i1 = int(np.argmin(np.abs(ALPHA_GRID - 1.0)))
    ll_brown = prof[:, i1]
    ir = ir_f[rows, ia]
    fbm_scale = sc_f[rows, ia]
    fbm_noise = fbm_scale * NOISE_RATIO_GRID[ir]
    brown_scale = sc_f[:, i1]
    brown_noise = brown_scale * NOISE_RATIO_GRID[ir_f[:, i1]]

    _check(stop)
    cprof, _, ir_c, sc_c = _profile_grid(P, w, bank.conf, bank.noise, n_axes)  # (T, C)
    _check(stop)
    ic = np.argmax(cprof, axis=1)
    C = bank.tau.size
    cinner = (ic >= 1) & (ic <= C - 2)
    c0 = cprof[rows, np.clip(ic - 1, 0, C - 1)]
    c1 = cprof[rows, ic]
    c2 = cprof[rows, np.clip(ic + 1, 0, C - 1)]
    coff, cval = _parabola(c0, c1, c2)
    ll_conf = np.where(cinner, cval, c1)
    ltau = np.log(bank.tau)
    conf_tau = np.exp(ltau[ic] + np.where(cinner, coff * (ltau[1] - ltau[0]), 0.0))
    icr = ir_c[rows, ic]
    conf_plateau = sc_c[rows, ic]
    conf_noise = conf_plateau * NOISE_RATIO_GRID[icr]

    # immobile: noise only
    spec_n = np.maximum(bank.noise, 1e-300)
    W = w.sum()
    sc_n = np.maximum(P @ (w / spec_n) / (n_axes * W), 1e-300)
    ll_imm = -n_axes * (np.log(spec_n) @ w + W * np.log(sc_n) + W)

    # directed: Brownian steps with a free mean (zero frequency left out of the fit)
    ll_d, _, idr, sc_d = _profile_grid(Pd, w, bank.fbm[i1 : i1 + 1], bank.noise, n_axes, drop_zero=True)
    ll_dir = ll_d[:, 0]
    dir_scale = sc_d[:, 0]
    dir_noise = dir_scale * NOISE_RATIO_GRID[idr[:, 0]]

    return StepFits(
        ll_immobile=ll_imm,
        ll_brownian=ll_brown,
        ll_fbm=ll_fbm,
        ll_confined=ll_conf,
        ll_directed=ll_dir,
        alpha_profile=prof,
        alpha=alpha,
        alpha_lo=lo,
        alpha_hi=hi,
        fbm_scale=fbm_scale,
        fbm_noise=fbm_noise,
        brown_scale=brown_scale,
        brown_noise=brown_noise,
        immobile_noise=sc_n,
        conf_plateau=conf_plateau,
        conf_tau=conf_tau,
        conf_noise=conf_noise,
        dir_scale=dir_scale,
        dir_noise=dir_noise,
        end_to_end=_end_to_end(steps),
        periodogram=P,
    )


def _interval(prof: np.ndarray, level: np.ndarray):
    """Where a profile (T, A) on ALPHA_GRID crosses ``level`` either side of its maximum (linear interp.)."""
    T, A = prof.shape
    above = prof >= level[:, None]
    ia = np.argmax(prof, axis=1)
    idx = np.arange(A)[None, :]
    # last index below level to the left of the max, first below level to the right
    left_below = np.where((~above) & (idx < ia[:, None]), idx, -1).max(axis=1)
    right_below = np.where((~above) & (idx > ia[:, None]), idx, A).min(axis=1)
    rows = np.arange(T)
    g = ALPHA_GRID

    def cross(i_out, i_in):
        y_out = prof[rows, i_out]
        y_in = prof[rows, i_in]
        frac = np.clip((level - y_out) / np.where(y_in - y_out > 0, y_in - y_out, 1.0), 0.0, 1.0)
        return g[i_out] + frac * (g[i_in] - g[i_out])

    lo = np.where(
        left_below >= 0, cross(np.clip(left_below, 0, A - 1), np.clip(left_below + 1, 0, A - 1)), g[0]
    )
    hi = np.where(
        right_below < A, cross(np.clip(right_below, 0, A - 1), np.clip(right_below - 1, 0, A - 1)), g[-1]
    )
    return lo, hi


def amplitude_at_alpha(
    steps: np.ndarray | None,
    *,
    exposure_ratio: float,
    alpha: float,
    periodogram: np.ndarray | None = None,
    n_steps: int | None = None,
    n_axes: int | None = None,
):
    """Per-track amplitude of a power-law model with fixed alpha, and its standard error on the log scale.

    The amplitude A (per-axis MSD at one frame, 2 K Δt^α) is fitted with each track's own noise variance B;
    the SE of log A is from the expected Whittle information of (log A, B), i.e. with the noise fitted too.

    ``periodogram`` (with ``n_steps`` and ``n_axes``, ``steps`` then None) gives the tracks' tapered
    periodograms when they are already known (``StepFits.periodogram``), instead of the steps.

    Returns
    -------
    log_A : ndarray (n_tracks,)
    se_log_A : ndarray (n_tracks,)
    """
    e = round(float(exposure_ratio), 4)
    if periodogram is None:
        T, N, n_axes = steps.shape
        bank = _bank(N, e)
        P = periodograms(steps, bank.taper)
    else:
        N, n_axes = int(n_steps), int(n_axes)
        bank = _bank(N, e)
        P = np.asarray(periodogram, dtype=float)
    w = bank.weights
    W = w.sum()
    shape = expected_periodogram(_blurred_power(np.arange(N + 1, dtype=float), float(alpha), e), bank.taper)
    _, r, i_r, _ = _profile_grid(P, w, shape[None, :], bank.noise, n_axes)
    r, i_r = r[:, 0], i_r[:, 0]
    from ._msd_kernels import amplitude_information

    # per track, in one compiled pass (numpy's operations and summation order, tested against them): the
    # noise ratio back on the grid where shape + r·noise falls below half the shape, spec = max(shape +
    # r·noise, 1e-300), A = max(Σ w P / spec / (n_axes W), 1e-300), and with S = A spec, g1 = A shape / S
    # (∂ log S / ∂ log A), g2 = noise / S (∂ log S / ∂ B), F_ij = n_axes Σ w g_i g_j: var = F22 / det (1 / F11
    # when det ≤ 0) times N Σ taper⁴, the variance inflation of a tapered periodogram
    A, var = amplitude_information(np.ascontiguousarray(P), w, shape, bank.noise, r, NOISE_RATIO_GRID[i_r],
                                   n_axes, W, N, float(np.sum(bank.taper**4)))
    return np.log(A), np.sqrt(var)


def ta_msd_relative_variance(msd_axis: np.ndarray, lag: int, n_steps: int, n_axes: int = 2) -> float:
    """Var/mean² of one track's time-averaged MSD at ``lag`` for a Gaussian process with stationary steps.

    ``msd_axis`` holds the per-axis MSD M(0..n_steps) of the observed positions (noise included). The
    time average over K = n_steps − lag + 1 windows has per-axis variance (2/K²) Σ_{j,l} c(j−l)² with
    c(m) = ½[M(|m|+n) + M(|m−n|) − 2M(|m|)]; axes are independent. For pure 2D Brownian motion this is
    Qian's ratio (4n²K + 2K + n − n³)/(6nK²) for n ≤ K (Qian, Sheetz & Elson 1991).
    """
    M = np.asarray(msd_axis, dtype=float)
    n = int(lag)
    K = int(n_steps) - n + 1
    if K < 1 or n < 1:
        return np.nan
    m = np.arange(K)
    c = 0.5 * (M[np.abs(m) + n] + M[np.abs(m - n)] - 2.0 * M[m])
    var_axis = 2.0 / K**2 * (K * c[0] ** 2 + 2.0 * np.sum((K - m[1:]) * c[1:] ** 2))
    return float(var_axis / (n_axes * M[n] ** 2))

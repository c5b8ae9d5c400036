"""Optics and camera model: turn particle positions into camera frames.

A particle is drawn as a Gaussian spot integrated exactly over each pixel (differences of the normal
cumulative distribution, separable in x and y). Motion blur is the average of the spot over sub-steps
within the exposure; out-of-focus particles (3D) are drawn wider and dimmer; the camera adds background,
Poisson shot noise, Gaussian read noise, gain and offset, and clips to 16 bits.

Coordinates follow :mod:`msdkit.schema`: x is the image column, y the row, and pixel ``(row i, column j)``
covers ``x`` in ``[j - 0.5, j + 0.5]`` and ``y`` in ``[i - 0.5, i + 0.5]`` (origin at the centre of pixel
(0, 0)).
"""

from __future__ import annotations

from collections.abc import Iterator

import numpy as np
from scipy.special import ndtr

from ..errors import expected_got

#: sigma of the Gaussian that best matches a widefield point-spread function, in units of lambda / NA
#: (Zhang, Zerubia & Olivo-Marin 2007, Appl. Opt. 46:1819, Table 1, paraxial widefield).
WIDEFIELD_SIGMA_PER_LAMBDA_NA = 0.21

#: Half-width of the pixel window drawn around each emitter, in spot SDs. The light outside +-4.5 sigma
#: per axis is below 1e-5 of the total.
WINDOW_SIGMAS = 4.5

#: Out-of-focus spots (beyond the focal depth) are faint: drawn within +-3 SD (99.5 % of their light).
WINDOW_SIGMAS_DEFOCUSED = 3.0

#: Window half-widths are rounded up to one of these sizes (fewer groups to draw, fewer numpy calls).
_HALF_SIZES = np.array([1, 2, 3, 4, 5, 6, 8, 10, 12, 14, 16, 20, 24, 28, 32, 40, 48, 64, 80, 96, 128])

#: Emitters whose spot is widened more than this factor in area (|z| > ~3.5 focal half-depths) are not
#: drawn: their peak is below 1/1000 of an in-focus spot's peak.
MAX_DEFOCUS_AREA_FACTOR = 32.0

_UINT16_MAX = 65535


def _rng(rng) -> np.random.Generator:
    return rng if isinstance(rng, np.random.Generator) else np.random.default_rng(rng)


def psf_sigma_um(*, wavelength_nm: float, numerical_aperture: float) -> float:
    """SD of the Gaussian approximation to a widefield point-spread function.

    Parameters
    ----------
    wavelength_nm : float, nm
        Emission (or scattered-light) wavelength.
    numerical_aperture : float
        Objective numerical aperture.

    Returns
    -------
    float, µm

    Notes
    -----
    sigma = 0.21 lambda / NA, the least-squares Gaussian fit to the paraxial widefield Airy pattern.

    References
    ----------
    B. Zhang, J. Zerubia & J.-C. Olivo-Marin, Appl. Opt. 46, 1819 (2007), doi:10.1364/AO.46.001819.

    Examples
    --------
    >>> round(psf_sigma_um(wavelength_nm=520, numerical_aperture=1.2), 4)
    0.091
    """
    if not wavelength_nm > 0:
        raise ValueError(expected_got("wavelength_nm", "> 0", wavelength_nm, "Give the wavelength in nm."))
    if not 0 < numerical_aperture < 1.7:
        raise ValueError(
            expected_got(
                "numerical_aperture", "between 0 and 1.7", numerical_aperture, "Give the objective NA."
            )
        )
    return WIDEFIELD_SIGMA_PER_LAMBDA_NA * wavelength_nm * 1e-3 / numerical_aperture


def defocus_area_factor(z_um, *, focal_depth_um: float | None) -> np.ndarray:
    """How much a spot at height ``z_um`` is widened in area (and dimmed in total) relative to focus.

    Parameters
    ----------
    z_um : array, µm
        Height above the focal plane.
    focal_depth_um : float or None, µm
        Full depth of field: a particle counts as in focus when ``|z| <= focal_depth_um / 2``. None: no
        defocus (2D scene), the factor is 1.

    Returns
    -------
    array
        w = 1 + (2 z / focal_depth)^2. The spot SD is ``sigma0 * sqrt(w)`` and its collected light is
        ``photons / w``, so the peak falls as ``1 / w^2``: at the edge of the focal depth (w = 2) the spot is
        sqrt(2) wider and its peak a quarter of the in-focus peak.

    Notes
    -----
    A phenomenological model with the form of a Gaussian beam's widening about its waist (common practice
    in simulations of single-particle movies); it is not a vectorial PSF.
    """
    z = np.asarray(z_um, dtype=float)
    if focal_depth_um is None:
        return np.ones_like(z)
    return 1.0 + (2.0 * z / float(focal_depth_um)) ** 2


def _add_spots(
    image: np.ndarray, x: np.ndarray, y: np.ndarray, photons: np.ndarray, sigma: np.ndarray, half: int
) -> None:
    """Add pixel-integrated Gaussian spots that all use a window of half-width ``half`` pixels."""
    ny, nx = image.shape
    offsets = np.arange(-half, half + 1)
    edges = np.arange(-half - 0.5, half + 1.0)  # W + 1 pixel edges relative to the centre pixel
    cx = np.rint(x).astype(np.int64)
    cy = np.rint(y).astype(np.int64)
    inv = 1.0 / sigma[:, None]
    ex = np.diff(ndtr((cx[:, None] + edges[None, :] - x[:, None]) * inv), axis=1)
    ey = np.diff(ndtr((cy[:, None] + edges[None, :] - y[:, None]) * inv), axis=1)
    cols = cx[:, None] + offsets[None, :]
    rows = cy[:, None] + offsets[None, :]
    ex *= (cols >= 0) & (cols < nx)
    ey *= photons[:, None] * ((rows >= 0) & (rows < ny))
    np.clip(cols, 0, nx - 1, out=cols)
    np.clip(rows, 0, ny - 1, out=rows)
    weights = ey[:, :, None] * ex[:, None, :]
    index = rows[:, :, None] * nx + cols[:, None, :]
    image += np.bincount(index.ravel(), weights=weights.ravel(), minlength=ny * nx).reshape(ny, nx)


def expected_photon_image(
    x_px,
    y_px,
    photons,
    *,
    frame_shape: tuple[int, int],
    psf_sigma_px,
    background_photons=0.0,
    window_sigmas=WINDOW_SIGMAS,
) -> np.ndarray:
    """Compute the expected photons per pixel of Gaussian spots, integrated exactly over each pixel.

    Parameters
    ----------
    x_px, y_px : array of shape (n_emitters,), pixels
        Spot centres (see the coordinate convention in the module docstring). NaN entries are skipped.
    photons : float or array of shape (n_emitters,)
        Total expected photons of each spot.
    frame_shape : (ny, nx)
    psf_sigma_px : float or array of shape (n_emitters,), pixels
        SD of each spot.
    background_photons : float or array of shape (ny, nx), default=0
        Expected background photons per pixel.
    window_sigmas : float or array of shape (n_emitters,), default=4.5
        Half-width of the pixel window evaluated around each spot, in spot SDs.

    Returns
    -------
    ndarray of shape (ny, nx), float64

    Notes
    -----
    Pixel (i, j) receives N [Phi((j + 1/2 - x)/s) - Phi((j - 1/2 - x)/s)] [Phi((i + 1/2 - y)/s) -
    Phi((i - 1/2 - y)/s)] with Phi the standard normal CDF: the Gaussian integrated over the pixel area
    (Smith, Joseph, Rieger & Lidke 2010, Nat. Methods 7:373; from memory). Only a window of
    +-``window_sigmas`` s around each spot is evaluated (at 4.5 s less than 1e-5 of the light is left out).

    Examples
    --------
    >>> img = expected_photon_image([5.0], [5.0], [1000.0], frame_shape=(11, 11), psf_sigma_px=1.0)
    >>> round(float(img.sum()), 2)
    1000.0
    """
    ny, nx = (int(v) for v in frame_shape)
    x = np.atleast_1d(np.asarray(x_px, dtype=float)).ravel()
    y = np.atleast_1d(np.asarray(y_px, dtype=float)).ravel()
    n = np.broadcast_to(np.asarray(photons, dtype=float), x.shape).ravel()
    s = np.broadcast_to(np.asarray(psf_sigma_px, dtype=float), x.shape).ravel()
    image = np.empty((ny, nx), dtype=float)
    image[...] = background_photons
    reach = np.broadcast_to(np.asarray(window_sigmas, dtype=float), x.shape).ravel()
    keep = np.isfinite(x) & np.isfinite(y) & (n > 0) & (s > 0)
    needed = np.ceil(reach * np.where(keep, s, 0.0))
    slot = np.minimum(np.searchsorted(_HALF_SIZES, needed), _HALF_SIZES.size - 1)
    halves = np.maximum(_HALF_SIZES[slot], needed).astype(np.int64)
    # skip spots whose window misses the image altogether
    keep &= (x + halves >= -0.5) & (x - halves <= nx - 0.5) & (y + halves >= -0.5) & (y - halves <= ny - 0.5)
    if not keep.any():
        return image
    x, y, n, s, halves = x[keep], y[keep], n[keep], s[keep], halves[keep]
    for half in np.unique(halves):
        sel = halves == half
        _add_spots(image, x[sel], y[sel], n[sel], s[sel], int(half))
    return image


def camera_counts(
    expected_photons: np.ndarray,
    *,
    read_noise_electrons: float = 0.0,
    gain_adu_per_electron: float = 1.0,
    offset_adu: float = 100.0,
    rng=None,
) -> np.ndarray:
    """Camera readout of an expected photon image: shot noise, read noise, gain, offset, 16-bit clipping.

    Parameters
    ----------
    expected_photons : ndarray, photoelectrons per pixel
    read_noise_electrons : float, default=0
        SD of the Gaussian read noise in electrons.
    gain_adu_per_electron : float, default=1
    offset_adu : float, default=100
        Camera baseline added to every pixel.
    rng : int, Generator or None

    Returns
    -------
    ndarray of uint16, same shape
        ``round(offset + gain (Poisson(expected) + read_noise * N(0, 1)))`` clipped to [0, 65535].

    Notes
    -----
    Detected photons are Poisson distributed (shot noise, variance = mean); read noise is Gaussian and
    independent of the signal (common practice; for sCMOS cameras see Huang et al. 2013, Nat. Methods
    10:653, from memory).
    Photons here are photoelectrons: quantum efficiency is folded into the photon numbers.
    """
    g = _rng(rng)
    electrons = g.poisson(np.clip(expected_photons, 0.0, None)).astype(float)
    if read_noise_electrons > 0:
        electrons += read_noise_electrons * g.standard_normal(electrons.shape)
    adu = np.rint(offset_adu + gain_adu_per_electron * electrons)
    return np.clip(adu, 0, _UINT16_MAX).astype(np.uint16)


def emitter_image(
    x_px,
    y_px,
    photons,
    *,
    frame_shape: tuple[int, int],
    psf_sigma_px: float,
    z_um=None,
    focal_depth_um: float | None = None,
    background_photons=0.0,
) -> np.ndarray:
    """Compute the expected photon image of one frame from particles sampled at sub-steps of the exposure.

    Parameters
    ----------
    x_px, y_px : array of shape (n_particles, n_substeps), pixels
        Positions at equally weighted instants within the exposure. NaN marks an absent particle.
    photons : array of shape (n_particles,)
        In-focus photons of each particle collected over the whole exposure.
    frame_shape : (ny, nx)
    psf_sigma_px : float, pixels
        In-focus spot SD.
    z_um : array of shape (n_particles, n_substeps), µm, optional
        Height above the focal plane (3D); widens and dims the spot (see :func:`defocus_area_factor`).
    focal_depth_um : float, optional
        Required with ``z_um``.
    background_photons : float or array of shape (ny, nx)

    Returns
    -------
    ndarray of shape (ny, nx), float64
        Expected photons; the motion-blurred spot is the mean of the spots at the sub-steps.
    """
    x = np.asarray(x_px, dtype=float)
    if x.ndim == 1:
        x = x[:, None]
    y = np.asarray(y_px, dtype=float).reshape(x.shape)
    n_sub = x.shape[1]
    per_step = np.broadcast_to(np.asarray(photons, dtype=float).reshape(-1, 1), x.shape) / n_sub
    sigma = np.full(x.shape, float(psf_sigma_px))
    reach = np.full(x.shape, WINDOW_SIGMAS)
    if z_um is not None and focal_depth_um is not None:
        w = defocus_area_factor(np.asarray(z_um, dtype=float).reshape(x.shape), focal_depth_um=focal_depth_um)
        per_step = np.where(w <= MAX_DEFOCUS_AREA_FACTOR, per_step / w, 0.0)
        sigma = sigma * np.sqrt(w)
        reach = np.where(w <= 2.0, WINDOW_SIGMAS, WINDOW_SIGMAS_DEFOCUSED)
    return expected_photon_image(
        x.ravel(),
        y.ravel(),
        per_step.ravel(),
        frame_shape=frame_shape,
        psf_sigma_px=sigma.ravel(),
        background_photons=background_photons,
        window_sigmas=reach.ravel(),
    )


def iter_movie_frames(
    x_px,
    y_px,
    photons,
    *,
    frame_shape: tuple[int, int],
    psf_sigma_px: float,
    z_um=None,
    focal_depth_um: float | None = None,
    background_photons=0.0,
    read_noise_electrons: float = 0.0,
    gain_adu_per_electron: float = 1.0,
    offset_adu: float = 100.0,
    rng=None,
) -> Iterator[np.ndarray]:
    """Yield camera frames (uint16) one at a time; arguments as in :func:`render_movie`."""
    g = _rng(rng)
    x = np.asarray(x_px, dtype=float)
    if x.ndim == 2:
        x = x[:, :, None]
    y = np.asarray(y_px, dtype=float).reshape(x.shape)
    z = None if z_um is None else np.asarray(z_um, dtype=float).reshape(x.shape)
    n = np.broadcast_to(np.asarray(photons, dtype=float), x.shape[:2])
    for k in range(x.shape[0]):
        expected = emitter_image(
            x[k],
            y[k],
            n[k],
            frame_shape=frame_shape,
            psf_sigma_px=psf_sigma_px,
            z_um=None if z is None else z[k],
            focal_depth_um=focal_depth_um,
            background_photons=background_photons,
        )
        yield camera_counts(
            expected,
            read_noise_electrons=read_noise_electrons,
            gain_adu_per_electron=gain_adu_per_electron,
            offset_adu=offset_adu,
            rng=g,
        )


def render_movie(
    x_px,
    y_px,
    photons,
    *,
    frame_shape: tuple[int, int],
    psf_sigma_px: float,
    z_um=None,
    focal_depth_um: float | None = None,
    background_photons=0.0,
    read_noise_electrons: float = 0.0,
    gain_adu_per_electron: float = 1.0,
    offset_adu: float = 100.0,
    rng=None,
) -> np.ndarray:
    """Render a movie of moving particles as a camera would record it.

    Parameters
    ----------
    x_px, y_px : array of shape (n_frames, n_particles, n_substeps) or (n_frames, n_particles), pixels
        Positions at equally spaced instants within each frame's exposure (motion blur averages the spot
        over them). NaN marks a particle absent from a frame.
    photons : array broadcastable to (n_frames, n_particles)
        In-focus photons (photoelectrons) of each particle per frame.
    frame_shape : (ny, nx)
    psf_sigma_px : float, pixels
        In-focus spot SD (see :func:`psf_sigma_um`).
    z_um : array like ``x_px``, µm, optional
        Height above the focal plane; with ``focal_depth_um`` the spot widens and dims away from focus.
    focal_depth_um : float, optional
    background_photons : float or array (ny, nx), default=0
    read_noise_electrons, gain_adu_per_electron, offset_adu : float
        Camera model, see :func:`camera_counts`.
    rng : int, Generator or None

    Returns
    -------
    ndarray of shape (n_frames, ny, nx), uint16

    Examples
    --------
    >>> x = np.full((3, 1), 8.0)
    >>> movie = render_movie(x, x, 500.0, frame_shape=(16, 16), psf_sigma_px=1.2, rng=0)
    >>> movie.shape, movie.dtype.name
    ((3, 16, 16), 'uint16')
    """
    x = np.asarray(x_px, dtype=float)
    out = np.empty((x.shape[0], int(frame_shape[0]), int(frame_shape[1])), dtype=np.uint16)
    frames = iter_movie_frames(
        x,
        y_px,
        photons,
        frame_shape=frame_shape,
        psf_sigma_px=psf_sigma_px,
        z_um=z_um,
        focal_depth_um=focal_depth_um,
        background_photons=background_photons,
        read_noise_electrons=read_noise_electrons,
        gain_adu_per_electron=gain_adu_per_electron,
        offset_adu=offset_adu,
        rng=rng,
    )
    for k, frame in enumerate(frames):
        out[k] = frame
    return out

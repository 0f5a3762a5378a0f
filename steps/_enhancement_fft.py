"""Wavenumber-domain grid filters on one tile: fill, pad, taper, real FFT, re-mask.

The operators are those of Blakely (1995, ch. 12) for a field sampled on a
horizontal plane, with the wavenumbers ``k_e``, ``k_n`` (rad/m) of the
discrete Fourier transform (numpy's sign convention, the one Blakely uses)
and ``|k| = sqrt(k_e**2 + k_n**2)``:

``derivative_upward``    ``-|k|`` (derivative with respect to elevation, positive up)
``derivative_easting``   ``i k_e``
``derivative_northing``  ``i k_n``
``upward_continued``     ``exp(-|k| h)`` for a rise of ``h`` metres
``reduced_to_pole``      ``1 / (theta_f theta_m)`` with
                         ``theta = u_z + i (u_e k_e + u_n k_n) / |k|`` for the
                         unit vectors of the main field ``f`` and of the
                         magnetisation ``m`` (z positive down, so
                         ``u_z = sin(inclination)``), induced magnetisation
                         (``m = f``) unless stated otherwise.

Total gradient amplitude (the amplitude of the 3-D analytic signal, Roest,
Verhoef & Pilkington 1992) is ``sqrt(d_e**2 + d_n**2 + d_up**2)`` and the
tilt angle (Miller & Singh 1994) ``arctan2(-d_up, sqrt(d_e**2 + d_n**2))``:
the vertical derivative positive *down*, as Miller & Singh define it, so the
tilt is positive over the source of a reduced-to-pole anomaly.

Stabilised reduction to the pole
    At low inclination ``theta`` nearly vanishes for wavenumbers along the
    magnetic east-west direction and the exact operator blows up. Below
    ``stabilise_below_deg`` the amplitude of the operator is taken at the
    *pseudo-inclination* ``I' = stabilise_below_deg`` while its phase stays
    that of the true inclination (MacLeod, Jones & Dai 1993): the operator
    becomes ``conj(theta_f theta_m) / (|theta_f| |theta_m| |theta'_f| |theta'_m|)``,
    bounded by ``1 / sin(I')**2``. It equals the exact operator when
    ``|I| >= I'``. (The formula is quoted from memory of that paper.)

Edges and blanks
    Blank (NaN) cells are filled with the value of the nearest valid cell
    (Euclidean distance transform, ``scipy.ndimage.distance_transform_edt``)
    and blended towards the mean of the valid cells with a half-cosine of
    the distance to the data over ``taper`` cells; the tile is then padded on
    every side by reflection and the pad multiplied by a half-cosine (Tukey)
    taper to the mean (Harris 1978), so the periodic extension of the FFT
    meets no step. After the inverse transform the padding is cut off and the
    blank cells are set to NaN again.

Speed and memory
    The multipliers depend only on the padded shape, the cell steps and the
    product settings, so they are computed once per padded shape and kept
    (a few shapes per grid: interior tiles share one). Per tile there is one
    forward real FFT; each product is the inverse transform of the spectrum
    times its multiplier, formed in one reused buffer that the inverse
    transform may overwrite. The temporaries of a tile are then the
    spectrum, that buffer and one inverse transform at a time (about three
    padded tiles), besides the fill and the padding made before the
    forward transform and released after it.

The zero wavenumber: derivatives remove it; upward continuation and the
reduction to the pole keep the mean level (multiplier 1 at ``k = 0``), so a
constant regional level passes through unchanged.

References
----------
Blakely, R. J. (1995). Potential Theory in Gravity and Magnetic Applications,
    ch. 12 (Fourier-domain operators). Cambridge University Press.
    (From memory.)
Harris, F. J. (1978). On the use of windows for harmonic analysis with the
    discrete Fourier transform. Proceedings of the IEEE 66(1), 51-83.
MacLeod, I. N., Jones, K. & Dai, T. F. (1993). 3-D analytic signal in the
    interpretation of total magnetic field data at low magnetic latitudes.
    Exploration Geophysics 24, 679-688. (From memory.)
Miller, H. G. & Singh, V. (1994). Potential field tilt - a new concept for
    location of potential field sources. Journal of Applied Geophysics 32,
    213-217.
Roest, W. R., Verhoef, J. & Pilkington, M. (1992). Magnetic interpretation
    using the 3-D analytic signal. Geophysics 57(1), 116-125.
Trefethen, L. N. (2000). Spectral Methods in MATLAB, ch. 3 (the Nyquist
    coefficient of an odd derivative set to zero). SIAM. (From memory.)
"""

from __future__ import annotations

import functools

import numpy as np
import scipy.fft
from scipy import ndimage

__all__ = ["PRODUCTS", "UNITS", "LONG_NAMES", "fill_blanks", "pad_taper", "wavenumbers", "rtp_operator", "filter_tile"]

#: Products in output order.
PRODUCTS = (
    "derivative_upward",
    "derivative_easting",
    "derivative_northing",
    "total_gradient_amplitude",
    "tilt_angle",
    "reduced_to_pole",
    "upward_continued",
)

UNITS = {
    "derivative_upward": "nT/m",
    "derivative_easting": "nT/m",
    "derivative_northing": "nT/m",
    "total_gradient_amplitude": "nT/m",
    "tilt_angle": "rad",
    "reduced_to_pole": "nT",
    "upward_continued": "nT",
}

LONG_NAMES = {
    "derivative_upward": "vertical derivative of the residual, positive up (FFT)",
    "derivative_easting": "easting derivative of the residual (FFT)",
    "derivative_northing": "northing derivative of the residual (FFT)",
    "total_gradient_amplitude": "total gradient amplitude (3-D analytic signal amplitude)",
    "tilt_angle": "tilt angle (vertical derivative positive down over horizontal gradient)",
    "reduced_to_pole": "residual reduced to the pole",
    "upward_continued": "residual continued upward",
}


def fill_blanks(values: np.ndarray, taper: int) -> tuple[np.ndarray, np.ndarray, float]:
    """Fill NaN cells from the nearest valid cell, blended to the mean with distance.

    Parameters
    ----------
    values : ndarray (ny, nx)
        Field, nT; NaN where blank.
    taper : int
        Distance (cells) over which filled cells fall from the nearest valid
        value to the mean of the valid cells (half-cosine).

    Returns
    -------
    filled : ndarray
        Mean-removed, NaN-free field.
    valid : ndarray of bool
        Where the input was finite.
    mean : float
        The mean removed, nT.
    """
    valid = np.isfinite(values)
    mean = float(values[valid].mean())
    out = values - mean
    if valid.all():
        return out, valid, mean
    dist, (iy, ix) = ndimage.distance_transform_edt(~valid, return_indices=True)
    out = out[iy, ix]
    weight = 0.5 * (1.0 + np.cos(np.pi * np.minimum(dist / max(taper, 1), 1.0)))
    out *= weight
    return out, valid, mean


def pad_taper(values: np.ndarray, pad: tuple[int, int]) -> tuple[np.ndarray, tuple[slice, slice]]:
    """Pad by reflection to a fast FFT size, the pad tapered to zero (half-cosine).

    Parameters
    ----------
    values : ndarray (ny, nx)
        Mean-removed, NaN-free field.
    pad : (int, int)
        Smallest pad on each side along (northing, easting), cells.

    Returns
    -------
    padded : ndarray
        The padded field.
    inner : (slice, slice)
        Where ``values`` sits in ``padded``.
    """
    out = values
    inner = []
    for axis, (n, p) in enumerate(zip(values.shape, pad)):
        total = scipy.fft.next_fast_len(n + 2 * p, real=True)
        before = (total - n) // 2
        after = total - n - before
        widths = [(0, 0), (0, 0)]
        widths[axis] = (before, after)
        out = np.pad(out, widths, mode="symmetric" if max(before, after) > n else "reflect")
        ramp = np.ones(total)
        if before:
            ramp[:before] = 0.5 * (1.0 - np.cos(np.pi * np.arange(before) / before))
        if after:
            ramp[n + before :] = 0.5 * (1.0 + np.cos(np.pi * (np.arange(after) + 1) / after))
        shape = [1, 1]
        shape[axis] = total
        out = out * ramp.reshape(shape)
        inner.append(slice(before, before + n))
    return out, (inner[0], inner[1])


def wavenumbers(shape: tuple[int, int], spacing: tuple[float, float]):
    """Wavenumbers (rad/m) of a real 2-D FFT of ``shape`` (ny, nx) with signed ``spacing`` (dn, de), m.

    Returns ``ke``, ``kn`` (for the odd, imaginary parts of the operators:
    zero at the Nyquist wavenumber of an even length, whose sign is
    ambiguous, as is usual for spectral first derivatives, Trefethen 2000)
    and ``|k|`` (from the full wavenumbers).
    """
    kn = 2 * np.pi * np.fft.fftfreq(shape[0], d=spacing[0])[:, None]
    ke = 2 * np.pi * np.fft.rfftfreq(shape[1], d=abs(spacing[1]))[None, :] * np.sign(spacing[1])
    k = np.sqrt(ke**2 + kn**2)
    if shape[0] % 2 == 0:
        kn = kn.copy()
        kn[shape[0] // 2] = 0.0
    if shape[1] % 2 == 0:
        ke = ke.copy()
        ke[:, -1] = 0.0
    return ke, kn, k


def _unit(inclination_deg: float, declination_deg: float):
    inc, dec = np.deg2rad(inclination_deg), np.deg2rad(declination_deg)
    return np.cos(inc) * np.sin(dec), np.cos(inc) * np.cos(dec), np.sin(inc)


def _theta(ke, kn, k, inclination_deg, declination_deg):
    ue, un, uz = _unit(inclination_deg, declination_deg)
    with np.errstate(invalid="ignore", divide="ignore"):
        return uz + 1j * (ue * ke + un * kn) / k


def rtp_operator(ke, kn, k, field_dir, magnetisation_dir=None, stabilise_below_deg: float = 0.0):
    """Reduction-to-the-pole multiplier (see the module docstring).

    Parameters
    ----------
    ke, kn, k : ndarray
        Wavenumbers, rad/m.
    field_dir, magnetisation_dir : (float, float)
        (inclination, declination from grid north), degrees; the
        magnetisation defaults to the field direction (induced).
    stabilise_below_deg : float
        Pseudo-inclination for the amplitude when the magnitude of an
        inclination is below it, degrees (0: exact operator).
    """
    magnetisation_dir = field_dir if magnetisation_dir is None else magnetisation_dir
    tf = _theta(ke, kn, k, *field_dir)
    tm = _theta(ke, kn, k, *magnetisation_dir)

    def pseudo(direction):
        inc, dec = direction
        if abs(inc) < stabilise_below_deg:
            inc = np.copysign(stabilise_below_deg, inc if inc != 0 else 1.0)
        return np.abs(_theta(ke, kn, k, inc, dec))

    with np.errstate(invalid="ignore", divide="ignore"):
        op = np.conj(tf * tm) / (np.abs(tf) * np.abs(tm) * pseudo(field_dir) * pseudo(magnetisation_dir))
    op[k == 0] = 1.0
    return op


@functools.lru_cache(maxsize=8)
def _multipliers(shape, spacing, products, upward_m, field_dir, magnetisation_dir, stabilise_below_deg):
    """The wavenumber multipliers of the products for one padded shape (read-only arrays)."""
    ke, kn, k = wavenumbers(shape, spacing)
    need_grad = any(p in products for p in ("total_gradient_amplitude", "tilt_angle"))
    mult = {}
    for name, make in (("derivative_upward", lambda: -k), ("derivative_easting", lambda: 1j * ke),
                       ("derivative_northing", lambda: 1j * kn)):
        if name in products or need_grad:
            mult[name] = np.broadcast_to(make(), (shape[0], shape[1] // 2 + 1))
    if "upward_continued" in products:
        mult["upward_continued"] = np.exp(-k * upward_m)
    if "reduced_to_pole" in products:
        mult["reduced_to_pole"] = rtp_operator(ke, kn, k, field_dir, magnetisation_dir, stabilise_below_deg)
    for m in mult.values():
        m.flags.writeable = False
    return mult


def filter_tile(
    values: np.ndarray,
    products: tuple[str, ...],
    spacing: tuple[float, float],
    pad_fraction: float,
    upward_m: float,
    field_dir: tuple[float, float],
    magnetisation_dir: tuple[float, float] | None,
    stabilise_below_deg: float,
    taper: int,
) -> np.ndarray:
    """All requested products of one tile, stacked along a new first axis.

    Parameters
    ----------
    values : ndarray (ny, nx)
        Residual, nT; NaN where blank.
    products : tuple of str
        Names from :data:`PRODUCTS`.
    spacing : (float, float)
        Signed cell steps along (northing, easting), m.
    pad_fraction : float
        Pad on each side as a fraction of the tile size.
    upward_m : float
        Rise of the upward continuation, m.
    field_dir, magnetisation_dir : (float, float)
        Directions for the reduction to the pole (see :func:`rtp_operator`).
    stabilise_below_deg : float
        Pseudo-inclination of the stabilised reduction to the pole, degrees.
    taper : int
        Blend distance of filled blanks to the mean, cells.

    Returns
    -------
    ndarray (len(products), ny, nx)
        NaN where the input was blank.
    """
    out = np.full((len(products),) + values.shape, np.nan)
    if not np.isfinite(values).any():
        return out
    filled, valid, mean = fill_blanks(values, taper)
    pad = tuple(max(8, int(np.ceil(pad_fraction * n))) for n in values.shape)
    padded, inner = pad_taper(filled, pad)
    del filled
    shape = padded.shape
    spectrum = scipy.fft.rfft2(padded, overwrite_x=True)
    del padded
    mult = _multipliers(shape, tuple(float(x) for x in spacing), tuple(products), float(upward_m),
                        tuple(float(x) for x in field_dir),
                        None if magnetisation_dir is None else tuple(float(x) for x in magnetisation_dir),
                        float(stabilise_below_deg))
    buffer = np.empty_like(spectrum)

    def back(name, into):
        np.multiply(spectrum, mult[name], out=buffer)
        into[...] = scipy.fft.irfft2(buffer, s=shape, overwrite_x=True)[inner]
        return into

    index = {name: i for i, name in enumerate(products)}
    # Gradients needed for the total gradient amplitude and tilt but not asked for go to spare planes.
    grads = {}
    for name in ("derivative_upward", "derivative_easting", "derivative_northing"):
        if name in mult:
            grads[name] = back(name, out[index[name]] if name in index else np.empty(values.shape))
    for name in products:
        i = index[name]
        if name in grads:
            continue
        if name == "total_gradient_amplitude":
            du, de, dn = grads["derivative_upward"], grads["derivative_easting"], grads["derivative_northing"]
            np.sqrt(du * du + de * de + dn * dn, out=out[i])
        elif name == "tilt_angle":
            horizontal = np.hypot(grads["derivative_easting"], grads["derivative_northing"])
            np.arctan2(-grads["derivative_upward"], horizontal, out=out[i])
        elif name in ("upward_continued", "reduced_to_pole"):
            back(name, out[i])
            out[i] += mean
        else:
            raise ValueError(f"unknown product {name!r}")
    out[:, ~valid] = np.nan
    return out

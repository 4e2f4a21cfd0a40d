"""Analytic ellipse phantoms and their exact projections (test oracles).

An ellipse of density rho, semi-axes a (along x before rotation) and b,
rotated counter-clockwise by alpha and centred at (x0, y0), has the
parallel-beam projection (Kak & Slaney ch. 3)::

    P(phi, s) = 2 rho a b / m^2 * sqrt(m^2 - t^2)   for |t| <= m, else 0
    m^2 = a^2 cos^2(phi - alpha) + b^2 sin^2(phi - alpha)
    t   = s - x0 cos(phi) - y0 sin(phi)

with the convention of the sinogram files: a point (x, y) is on the line
(phi, s) when ``x cos(phi) + y sin(phi) = s``.

References
----------
A. C. Kak and M. Slaney, *Principles of Computerized Tomographic Imaging*,
IEEE Press 1988, ch. 3.
L. A. Shepp and B. F. Logan, "The Fourier reconstruction of a head
section", IEEE Trans Nucl Sci 21(3):21-43, 1974.
P. A. Toft, *The Radon Transform - Theory and Implementation*, PhD thesis,
Technical University of Denmark, 1996 (the higher-contrast version).
"""

from __future__ import annotations

import numpy as np

# (density, a, b, x0, y0, rotation in degrees), on the square [-1, 1]^2;
# Shepp & Logan (1974) as tabulated in references.md section 5.
SHEPP_LOGAN = (
    (2.0, 0.69, 0.92, 0.0, 0.0, 0.0),
    (-0.98, 0.6624, 0.874, 0.0, -0.0184, 0.0),
    (-0.02, 0.11, 0.31, 0.22, 0.0, -18.0),
    (-0.02, 0.16, 0.41, -0.22, 0.0, 18.0),
    (0.01, 0.21, 0.25, 0.0, 0.35, 0.0),
    (0.01, 0.046, 0.046, 0.0, 0.1, 0.0),
    (0.01, 0.046, 0.046, 0.0, -0.1, 0.0),
    (0.01, 0.046, 0.023, -0.08, -0.605, 0.0),
    (0.01, 0.023, 0.023, 0.0, -0.606, 0.0),
    (0.01, 0.023, 0.046, 0.06, -0.605, 0.0),
)

#: The higher-contrast intensities (Toft 1996), same geometry.
SHEPP_LOGAN_MODIFIED = tuple((rho, *rest) for rho, (_, *rest) in
                             zip((1.0, -0.8, -0.2, -0.2, 0.1, 0.1, 0.1, 0.1, 0.1, 0.1), SHEPP_LOGAN))


def scaled(ellipses, scale_mm: float):
    """The same phantom with lengths multiplied by ``scale_mm`` (densities unchanged)."""
    return tuple((rho, a * scale_mm, b * scale_mm, x0 * scale_mm, y0 * scale_mm, deg)
                 for rho, a, b, x0, y0, deg in ellipses)


def ellipse_projections(ellipses, view_angles_rad, radial_positions_mm) -> np.ndarray:
    """Exact line integrals of a sum of ellipses, shape (views, radial)."""
    phi = np.asarray(view_angles_rad, dtype=np.float64)[:, None]
    s = np.asarray(radial_positions_mm, dtype=np.float64)[None, :]
    out = np.zeros((phi.shape[0], s.shape[1]))
    for rho, a, b, x0, y0, deg in ellipses:
        alpha = np.deg2rad(deg)
        m2 = a ** 2 * np.cos(phi - alpha) ** 2 + b ** 2 * np.sin(phi - alpha) ** 2
        t = s - x0 * np.cos(phi) - y0 * np.sin(phi)
        inside = m2 - t ** 2
        out += np.where(inside > 0, 2.0 * rho * a * b / m2 * np.sqrt(np.maximum(inside, 0.0)), 0.0)
    return out


def ellipse_image(ellipses, x_mm, y_mm, supersample: int = 4) -> np.ndarray:
    """Mean density of a sum of ellipses over square pixels, shape (len(y), len(x)).

    ``x_mm`` and ``y_mm`` are evenly spaced pixel centres; each pixel is
    sampled on a ``supersample x supersample`` sub-grid.
    """
    x = np.asarray(x_mm, dtype=np.float64)
    y = np.asarray(y_mm, dtype=np.float64)
    dx = x[1] - x[0] if len(x) > 1 else 1.0
    dy = y[1] - y[0] if len(y) > 1 else 1.0
    offsets = (np.arange(supersample) + 0.5) / supersample - 0.5
    out = np.zeros((len(y), len(x)))
    for oy in offsets:
        for ox in offsets:
            X = (x + ox * dx)[None, :]
            Y = (y + oy * dy)[:, None]
            for rho, a, b, x0, y0, deg in ellipses:
                alpha = np.deg2rad(deg)
                u = (X - x0) * np.cos(alpha) + (Y - y0) * np.sin(alpha)
                v = -(X - x0) * np.sin(alpha) + (Y - y0) * np.cos(alpha)
                out += rho * ((u / a) ** 2 + (v / b) ** 2 <= 1.0)
    return out / supersample ** 2

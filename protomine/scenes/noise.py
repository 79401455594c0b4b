"""Sensor realism for rendered frames: axial depth noise, dropped readings, RGB noise.

Axial noise follows the structured-light model measured by Nguyen, Izadi & Lovell (2012), "Modeling
Kinect sensor noise for improved 3D reconstruction and tracking" (3DIMPVT), for z in metres:

    sigma_z(z) = 0.0012 + 0.0019 (z - 0.4)^2                         for 10 deg <= theta <= 60 deg
    sigma_z(z, theta) = sigma_z(z) + 0.0001 / sqrt(z) * theta^2 / (pi/2 - theta)^2   for theta > 60 deg

theta being the angle between the view ray and the surface normal.  Readings are dropped beyond a
grazing angle (the projector pattern is lost there) and at random.  Quantisation to the depth scale
is left to :func:`protomine.capture.write_capture`.  All randomness comes from the one
``np.random.Generator`` passed in.
"""
from __future__ import annotations

import numpy as np

from .render import Render


def axial_sigma(z: np.ndarray, theta_rad: np.ndarray | None = None) -> np.ndarray:
    """Axial depth noise std (metres) at depth z (...) metres and incidence angle theta_rad (...).

    Nguyen, Izadi & Lovell (2012), eqs. for sigma_z; theta None means an angle below 60 degrees.
    """
    z = np.asarray(z, dtype=np.float64)
    s = 0.0012 + 0.0019 * (z - 0.4) ** 2
    if theta_rad is not None:
        th = np.clip(np.asarray(theta_rad, dtype=np.float64), 0.0, np.pi / 2 - 1e-3)
        steep = th > np.deg2rad(60.0)
        extra = 0.0001 / np.sqrt(np.maximum(z, 1e-6)) * th ** 2 / (np.pi / 2 - th) ** 2
        s = s + np.where(steep, extra, 0.0)
    return s


def add_sensor_noise(frame: Render, rng: np.random.Generator, *, dropout: float = 0.01,
                     grazing_deg: float = 78.0, rgb_sigma: float = 2.0) -> tuple[np.ndarray, np.ndarray]:
    """Noisy copies of a rendered frame.

    Returns depth (H, W) float64 metres (0 = dropped or no hit) and rgb (H, W, 3) uint8.
    dropout: probability of losing any valid reading; grazing_deg: readings whose view ray makes a larger
    angle with the surface normal are lost; rgb_sigma: RGB noise std in 8-bit levels.
    """
    if not 0.0 <= dropout < 1.0:
        raise ValueError(f"dropout must be in [0, 1), got {dropout}")
    if not 0.0 < grazing_deg <= 90.0:
        raise ValueError(f"grazing_deg must be in (0, 90], got {grazing_deg}")
    return _add_sensor_noise(frame, rng, dropout, grazing_deg, rgb_sigma)


def _add_sensor_noise(frame: Render, rng: np.random.Generator, dropout: float, grazing_deg: float,
                      rgb_sigma: float) -> tuple[np.ndarray, np.ndarray]:
    z = frame.depth.astype(np.float64)
    valid = z > 0
    theta = np.arccos(np.clip(frame.cos_incidence.astype(np.float64), 0.0, 1.0))
    sigma = axial_sigma(np.where(valid, z, 1.0), theta)
    noisy = z + rng.standard_normal(z.shape) * sigma
    keep = valid & (theta <= np.deg2rad(grazing_deg)) & (rng.random(z.shape) >= dropout) & (noisy > 0)
    depth = np.where(keep, noisy, 0.0)
    rgb = frame.rgb.astype(np.float64) * 255.0 + rng.standard_normal(frame.rgb.shape) * rgb_sigma
    return depth, np.clip(np.rint(rgb), 0, 255).astype(np.uint8)

"""Sensor realism for rendered frames: two depth models (gaussian axial noise, active stereo), dropped
readings, RGB noise.

Gaussian model (:func:`add_sensor_noise`):

Axial noise follows the structured-light model measured by Nguyen, Izadi & Lovell (2012), "Modeling
Kinect sensor noise for improved 3D reconstruction and tracking" (3DIMPVT), for z in metres:

    sigma_z(z) = 0.0012 + 0.0019 (z - 0.4)^2                         for 10 deg <= theta <= 60 deg
    sigma_z(z, theta) = sigma_z(z) + 0.0001 / sqrt(z) * theta^2 / (pi/2 - theta)^2   for theta > 60 deg

theta being the angle between the view ray and the surface normal.  Readings are dropped beyond a
grazing angle (the projector pattern is lost there) and at random.  Quantisation to the depth scale
is left to :func:`protomine.capture.write_capture`.  All randomness comes from the one
``np.random.Generator`` passed in.

Active-stereo model (:func:`stereo_depth`, :class:`StereoSensor`): depth from a disparity quantised in
sub-pixel steps (terraces, error ~ z^2), projector shadows beside objects, dropouts and flying pixels at
depth edges, then grazing and random dropout as above (Khoshelham & Elberink 2012 for the parameters).
"""
from __future__ import annotations

from dataclasses import dataclass

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


# --- structured-light / active-stereo depth ------------------------------------------------------------

@dataclass(frozen=True)
class StereoSensor:
    """An active-stereo depth sensor: a projector (or second view) at ``baseline_m`` along camera +x.

    Depth comes from disparity d = f b / z (f = ``focal_px``, the matcher's native focal length in
    pixels, b = the baseline); d is measured with noise ``sigma_px`` and quantised to ``subpixel`` of a
    native pixel, so depth falls on terraces spaced z^2 subpixel / (f b) and its error grows with z^2.
    Defaults are the first Kinect's, from Khoshelham & Elberink (2012), "Accuracy and resolution of
    Kinect depth data for indoor mapping applications", Sensors 12(2) (values from memory): baseline
    about 7.5 cm, IR focal length about 580 px at 640x480, disparity stored in 1/8 pixel steps (depth
    resolution about 7 cm at 5 m), random depth error growing quadratically to about 4 cm at 5 m, which
    gives sigma_d = 0.04 f b / 5^2 = 0.07 px.

    Edges: the matcher correlates ``window_px``-wide windows (native pixels; 9 is a common block size,
    an assumption, not a figure from the paper), so within half a window of a depth discontinuity
    (neighbouring disparities differ by more than ``edge_jump_px``) the window straddles two surfaces: the
    reading is lost with probability ``edge_dropout``, becomes a flying pixel (a disparity between the
    near and the far surface's) with probability ``edge_flying``, and is kept otherwise; both shares
    taper linearly from the discontinuity to zero half a window away, as less of the window straddles it
    (shares are assumptions, chosen so that depth edges look like the published sensor images: a ragged
    band with some mixed readings).
    """

    baseline_m: float = 0.075
    focal_px: float = 580.0
    subpixel: float = 1.0 / 8.0
    sigma_px: float = 0.07
    window_px: float = 9.0
    edge_jump_px: float = 1.0
    edge_dropout: float = 0.4
    edge_flying: float = 0.3
    shadow_tol_px: float = 0.5

    def __post_init__(self) -> None:
        if self.baseline_m <= 0 or self.focal_px <= 0 or self.subpixel < 0 or self.sigma_px < 0:
            raise ValueError(f"expected baseline_m, focal_px > 0 and subpixel, sigma_px >= 0, got {self}")
        if not (0 <= self.edge_dropout and 0 <= self.edge_flying and self.edge_dropout + self.edge_flying <= 1):
            raise ValueError(f"expected edge_dropout, edge_flying >= 0 with a sum <= 1, got {self}")

    def terrace_m(self, z: np.ndarray | float) -> np.ndarray:
        """Spacing (metres) of the depth levels at depth z: z^2 subpixel / (f b)."""
        return np.asarray(z, np.float64) ** 2 * self.subpixel / (self.focal_px * self.baseline_m)


def projector_shadow(depth: np.ndarray, fx: float, baseline_m: float, *, tol_px: float = 0.5,
                     oversample: int = 4) -> np.ndarray:
    """(H, W) bool: valid readings the projector at ``baseline_m`` along camera +x cannot light.

    depth (H, W) metres (0 = none), fx the image's focal length in pixels.  Camera and projector are a
    rectified pair, so a camera pixel (u, v) at disparity d = fx b / z is lit by projector column u - d of
    the same row.  Every reading is splatted as a one-pixel span at its projector column into a
    projector-side buffer (``oversample`` sub-columns per pixel) that keeps the largest disparity, i.e. the
    surface nearest the projector; a reading whose disparity is more than ``tol_px`` below that buffer at its
    own column is hidden from the projector: a shadow beside the object's edge, fx b (1/z_near - 1/z_far)
    pixels wide.
    """
    z = np.asarray(depth, np.float64)
    H, W = z.shape
    valid = z > 0
    d = np.where(valid, fx * baseline_m / np.where(valid, z, 1.0), 0.0)
    v, u = np.nonzero(valid)
    x = u - d[v, u]                                          # projector column of each reading
    s = int(oversample)
    lo = np.floor((x - 0.5) * s).astype(np.int64)
    c0 = lo.min() if len(lo) else 0
    ncol = int((np.ceil((x.max() + 0.5) * s) if len(x) else 0) - c0 + 2)
    buf = np.zeros((H, max(ncol, 1)))
    for k in range(s + 1):
        np.maximum.at(buf, (v, lo + k - c0), d[v, u])
    centre = np.rint(x * s).astype(np.int64) - c0
    out = np.zeros((H, W), bool)
    out[v, u] = d[v, u] < buf[v, centre] - tol_px
    return out


def depth_edges(disparity: np.ndarray, jump: float, half_width: int) -> np.ndarray:
    """(H, W) bool: pixels within ``half_width`` pixels (square window) of a discontinuity, i.e. of a
    4-neighbour pair whose disparities (0 = no reading, the farthest) differ by more than ``jump``."""
    from scipy.ndimage import binary_dilation
    d = np.asarray(disparity, np.float64)
    jump_x = np.abs(np.diff(d, axis=1)) > jump
    jump_y = np.abs(np.diff(d, axis=0)) > jump
    seed = np.zeros(d.shape, bool)
    seed[:, :-1] |= jump_x
    seed[:, 1:] |= jump_x
    seed[:-1] |= jump_y
    seed[1:] |= jump_y
    if half_width <= 0:
        return seed
    return binary_dilation(seed, structure=np.ones((2 * half_width + 1,) * 2, bool))


def stereo_depth(frame: Render, fx: float, rng: np.random.Generator, sensor: StereoSensor = StereoSensor(), *,
                 dropout: float = 0.01, grazing_deg: float = 78.0) -> np.ndarray:
    """Depth (H, W) float64 metres (0 = no reading) of a rendered frame as an active-stereo sensor gives it.

    fx: the rendered image's focal length (pixels), which sets the width of shadows and edge bands in
    image pixels; the sensor's own ``focal_px`` sets disparity noise and quantisation (see
    :class:`StereoSensor`).  Order: projector shadows (from the true depth), edge band (dropouts and flying
    pixels), disparity noise and quantisation, then grazing-angle and random dropout as in
    :func:`add_sensor_noise`.
    """
    if not 0.0 <= dropout < 1.0:
        raise ValueError(f"dropout must be in [0, 1), got {dropout}")
    if not 0.0 < grazing_deg <= 90.0:
        raise ValueError(f"grazing_deg must be in (0, 90], got {grazing_deg}")
    if fx <= 0:
        raise ValueError(f"fx must be > 0, got {fx}")
    return _stereo_depth(frame, float(fx), rng, sensor, dropout, grazing_deg)


def _stereo_depth(frame: Render, fx: float, rng: np.random.Generator, sensor: StereoSensor, dropout: float,
                  grazing_deg: float) -> np.ndarray:
    from scipy.ndimage import distance_transform_cdt, maximum_filter, minimum_filter
    z = frame.depth.astype(np.float64)
    valid = z > 0
    fb = sensor.focal_px * sensor.baseline_m
    d = np.where(valid, fb / np.where(valid, z, 1.0), 0.0)           # native-pixel disparity, 0 = none
    shadow = projector_shadow(z, fx, sensor.baseline_m, tol_px=sensor.shadow_tol_px)
    half = max(1, int(round(0.5 * (sensor.window_px - 1) * fx / sensor.focal_px)))
    lit = np.where(valid & ~shadow, d, 0.0)
    # distance (pixels, chessboard) to the nearest discontinuity: the closer, the more of the matching
    # window straddles it, so the failure shares taper linearly from the edge to half a window away
    seed = depth_edges(lit, sensor.edge_jump_px, 0)
    dist = distance_transform_cdt(~seed, metric="chessboard") if seed.any() else np.full(z.shape, half + 1)
    edge = valid & ~shadow & (dist <= half)
    taper = np.clip(1.0 - dist / (half + 1.0), 0.0, 1.0)
    # near and far surface within the matching window: the largest and the smallest lit disparity
    size = 2 * half + 1
    d_near = maximum_filter(lit, size=size)
    d_far = minimum_filter(np.where(lit > 0, lit, np.inf), size=size)
    u = rng.random(z.shape)
    drop_edge = edge & (u < sensor.edge_dropout * taper)
    fly = edge & ~drop_edge & (u < (sensor.edge_dropout + sensor.edge_flying) * taper) & np.isfinite(d_far)
    a = rng.random(z.shape)
    d = np.where(fly, a * d_near + (1.0 - a) * np.where(np.isfinite(d_far), d_far, 0.0), d)
    d = d + rng.standard_normal(z.shape) * sensor.sigma_px
    if sensor.subpixel > 0:
        d = np.rint(d / sensor.subpixel) * sensor.subpixel
    theta = np.arccos(np.clip(frame.cos_incidence.astype(np.float64), 0.0, 1.0))
    keep = (valid & ~shadow & ~drop_edge & (d > 0) & (theta <= np.deg2rad(grazing_deg))
            & (rng.random(z.shape) >= dropout))
    return np.where(keep, fb / np.where(keep, d, 1.0), 0.0)

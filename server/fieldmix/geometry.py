"""Coordinates, written once.

Listener at the origin; x to the right, y to the front, z up, metres.
Azimuth in degrees, 0 = front, positive = to the left (counter-clockwise seen
from above); elevation in degrees, positive = up (ITU-R BS.2051 convention).
All functions are vectorised: they take arrays of shape (..., 3) or (...,).
"""

from __future__ import annotations

import math

import numpy as np


def sph_to_cart(azimuth_deg, elevation_deg, distance=1.0) -> np.ndarray:
    """Azimuth/elevation (degrees) and distance (m) to [x, y, z] (m)."""
    az = np.radians(np.asarray(azimuth_deg, dtype=np.float64))
    el = np.radians(np.asarray(elevation_deg, dtype=np.float64))
    d = np.asarray(distance, dtype=np.float64)
    ce = np.cos(el)
    x = -np.sin(az) * ce * d
    y = np.cos(az) * ce * d
    z = np.sin(el) * d
    return np.stack(np.broadcast_arrays(x, y, z), axis=-1)


def cart_to_sph(xyz) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """[x, y, z] (m) to (azimuth_deg, elevation_deg, distance_m).

    Azimuth is in (-180, 180]; at the origin all three are 0.
    """
    p = np.asarray(xyz, dtype=np.float64)
    x, y, z = p[..., 0], p[..., 1], p[..., 2]
    horiz = np.hypot(x, y)
    dist = np.hypot(horiz, z)
    az = np.degrees(np.arctan2(-x, y))
    el = np.degrees(np.arctan2(z, horiz))
    az = np.where(az <= -180.0, az + 360.0, az)
    return az, el, dist


def unit(xyz, eps: float = 1e-12) -> np.ndarray:
    """Unit vectors along ``xyz``; the zero vector maps to the front [0, 1, 0]."""
    p = np.asarray(xyz, dtype=np.float64)
    n = np.linalg.norm(p, axis=-1, keepdims=True)
    front = np.zeros_like(p)
    front[..., 1] = 1.0
    return np.where(n > eps, p / np.maximum(n, eps), front)


def wrap_deg(angle) -> np.ndarray:
    """Wrap degrees into (-180, 180]."""
    a = np.mod(np.asarray(angle, dtype=np.float64) + 180.0, 360.0) - 180.0
    return np.where(a <= -180.0, a + 360.0, a)


def angle_between_deg(u, v) -> np.ndarray:
    """Angle in degrees between vectors (any length, broadcast over leading axes)."""
    a = unit(u)
    b = unit(v)
    c = np.clip(np.sum(a * b, axis=-1), -1.0, 1.0)
    return np.degrees(np.arccos(c))


def db_to_gain(db) -> np.ndarray:
    return np.power(10.0, np.asarray(db, dtype=np.float64) / 20.0)


def gain_to_db(g, floor_db: float = -200.0) -> np.ndarray:
    g = np.asarray(g, dtype=np.float64)
    with np.errstate(divide="ignore"):
        return np.maximum(20.0 * np.log10(np.abs(g)), floor_db)


def speed_of_sound(temperature_c: float = 20.0) -> float:
    """Speed of sound in air, m/s: c = 331.3 * sqrt(1 + T/273.15).

    Handbook value (343.2 m/s at 20 C), see docs/layouts.md.
    """
    return 331.3 * float(np.sqrt(1.0 + temperature_c / 273.15))


# Scalar versions for the control path (one source at a time): plain math, no numpy
# call overhead (a numpy round trip costs tens of microseconds per message here).
def sph_to_xyz(azimuth_deg: float, elevation_deg: float, distance: float) -> tuple[float, float, float]:
    az = math.radians(azimuth_deg)
    el = math.radians(elevation_deg)
    ce = math.cos(el) * distance
    return (-math.sin(az) * ce, math.cos(az) * ce, math.sin(el) * distance)


def xyz_to_sph(x: float, y: float, z: float) -> tuple[float, float, float]:
    horiz = math.hypot(x, y)
    dist = math.hypot(horiz, z)
    az = math.degrees(math.atan2(-x, y))
    if az <= -180.0:
        az += 360.0
    el = math.degrees(math.atan2(z, horiz))
    return az, el, dist

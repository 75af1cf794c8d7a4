"""Acquisition geometries of a DBT unit: source arc, detector, motion and noise.

Coordinates are world ``(x, y, z)`` in mm: the detector lies in the plane ``z = 0``,
``x`` is the direction of source travel, ``y`` runs from the chest wall (``y = 0``,
below the source) towards the nipple, ``z`` is the height above the detector.

The source moves on an arc of radius ``source_to_image_mm - pivot_height_mm`` about a
rotation centre at height ``pivot_height_mm`` above the detector (0: the arc is centred
in the detector plane), so at angle ``θ`` it sits at
``(R sin θ, source_y_mm, pivot_height_mm + R cos θ)``; at ``θ = 0`` it is
``source_to_image_mm`` above the detector.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

MOTIONS = ("step-and-shoot", "continuous")


@dataclass(frozen=True)
class Detector:
    """A flat detector in the plane z = 0 with square pixels.

    ``first_centre_xy_mm`` is the ``(x, y)`` centre of pixel ``[row 0, column 0]``;
    columns run along x, rows along y. ``fill_factor`` is the side of the sensitive
    square aperture as a fraction of the pitch; ``blur_sd_mm`` the SD of a Gaussian
    spread of each pixel's signal (light spread in a scintillator; 0 for none).
    """

    pitch_mm: float
    columns: int
    rows: int
    first_centre_xy_mm: tuple[float, float]
    fill_factor: float = 1.0
    blur_sd_mm: float = 0.0

    @property
    def shape(self) -> tuple[int, int]:
        return (self.rows, self.columns)

    def u_mm(self) -> np.ndarray:
        """x positions of the column centres."""
        return self.first_centre_xy_mm[0] + self.pitch_mm * np.arange(self.columns)

    def v_mm(self) -> np.ndarray:
        """y positions of the row centres."""
        return self.first_centre_xy_mm[1] + self.pitch_mm * np.arange(self.rows)


@dataclass(frozen=True)
class DbtGeometry:
    """A tomosynthesis acquisition.

    Parameters
    ----------
    name, description : str
    source_to_image_mm : float
        Source height above the detector at 0°.
    pivot_height_mm : float
        Height of the arc's rotation centre above the detector.
    angles_deg : tuple of float
        Nominal view angles (centre of each exposure for continuous motion).
    detector : Detector
    motion : {"step-and-shoot", "continuous"}
    sweep_deg : float
        Arc swept during one exposure (continuous motion only).
    motion_samples : int
        Source sub-positions integrated over the sweep.
    focal_spot_mm : float
        Width of a uniform focal spot along x (0: a point source).
    focal_samples : int
        Sub-positions across the focal spot.
    aperture_samples : int
        Sub-rays per pixel side integrating the square pixel aperture.
    photons_per_pixel : float or None
        Mean detected quanta per pixel per view with nothing in the beam (``None``:
        noiseless).
    electronic_sd : float
        Electronic noise, SD in quanta per pixel.
    plane_spacing_mm : float
        Spacing of reconstructed planes.
    source_y_mm : float
        y of the source arc (the chest-wall line).
    """

    name: str
    description: str
    source_to_image_mm: float
    pivot_height_mm: float
    angles_deg: tuple[float, ...]
    detector: Detector
    motion: str = "step-and-shoot"
    sweep_deg: float = 0.0
    motion_samples: int = 1
    focal_spot_mm: float = 0.0
    focal_samples: int = 1
    aperture_samples: int = 2
    photons_per_pixel: float | None = None
    electronic_sd: float = 0.0
    plane_spacing_mm: float = 1.0
    source_y_mm: float = 0.0
    notes: tuple[str, ...] = field(default_factory=tuple)

    @property
    def n_views(self) -> int:
        return len(self.angles_deg)

    @property
    def half_arc_deg(self) -> float:
        return 0.5 * (max(self.angles_deg) - min(self.angles_deg))

    @property
    def radius_mm(self) -> float:
        return self.source_to_image_mm - self.pivot_height_mm

    def source_xyz(self, angle_deg: float, *, offset_x_mm: float = 0.0) -> np.ndarray:
        """Source position at ``angle_deg`` (``offset_x_mm`` moves it across the spot)."""
        t = np.radians(angle_deg)
        r = self.radius_mm
        return np.array([r * np.sin(t) + offset_x_mm, self.source_y_mm,
                         self.pivot_height_mm + r * np.cos(t)])

    def source_samples(self, view: int) -> tuple[np.ndarray, np.ndarray]:
        """Sub-positions of the source for one view and their weights (summing to 1).

        Continuous motion spreads ``motion_samples`` positions uniformly over
        ``sweep_deg``; a focal spot of width ``focal_spot_mm`` spreads ``focal_samples``
        positions uniformly along x (a uniform spot, common practice for simulation).
        """
        angle = self.angles_deg[view]
        if self.motion == "continuous" and self.sweep_deg > 0 and self.motion_samples > 1:
            m = self.motion_samples
            angles = angle + self.sweep_deg * ((np.arange(m) + 0.5) / m - 0.5)
        else:
            angles = np.array([angle])
        if self.focal_spot_mm > 0 and self.focal_samples > 1:
            f = self.focal_samples
            offsets = self.focal_spot_mm * ((np.arange(f) + 0.5) / f - 0.5)
        else:
            offsets = np.array([0.0])
        pts = np.array([self.source_xyz(a, offset_x_mm=o) for a in angles for o in offsets])
        return pts, np.full(len(pts), 1.0 / len(pts))

    def nominal_sources(self) -> np.ndarray:
        """(n_views, 3) source positions at the nominal angles."""
        return np.array([self.source_xyz(a) for a in self.angles_deg])

"""Viewing geometry: how many image pixels fall in one degree of a visitor's view. Used by
the flash limiter (WCAG's area threshold) and by the bench's S-CIELAB filters."""
from __future__ import annotations

import math
from dataclasses import dataclass

from .errors import InputError


@dataclass(frozen=True)
class ViewingGeometry:
    """The image spans the display's width; pixels per degree follow from the distance."""
    display_width_m: float = 1.2      # a 55-inch screen is about 1.21 m wide
    viewing_distance_m: float = 2.0   # a visitor a couple of steps back

    def __post_init__(self) -> None:
        if self.display_width_m <= 0 or self.viewing_distance_m <= 0:
            raise InputError(f"viewing geometry must be positive, got width "
                             f"{self.display_width_m} m at {self.viewing_distance_m} m")

    def pixels_per_degree(self, image_width_px: int) -> float:
        fov_deg = math.degrees(2 * math.atan(self.display_width_m / (2 * self.viewing_distance_m)))
        return image_width_px / fov_deg

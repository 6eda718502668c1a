"""Idealised focal-spot optics of a pulsed laser: estimates, never measurements.

A real eye, a real lens and a real beam are worse than diffraction-limited, so every value
here is labelled *idealised* wherever it is shown. Formulas are standard optics (Hecht,
Optics; Born & Wolf, Principles of Optics):
- numerical aperture in air: NA = sin(half cone angle)
- Airy disk diameter to the first dark ring: d = 1.22 * lambda / NA
- peak irradiance of an Airy pattern: I0 = P * pi * NA^2 / lambda^2, so for one pulse the
  idealised peak fluence is F0 = E * pi * NA^2 / lambda^2.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

_NM_PER_UM = 1000.0
_CM_PER_NM = 1e-7
_J_PER_MJ = 1e-3


@dataclass(frozen=True, slots=True)
class FocalSpot:
    """An idealised diffraction-limited focus for one pulse energy."""

    cone_angle_deg: float
    cone_angle_assumed: bool
    numerical_aperture: float
    airy_diameter_um: float
    pulse_energy_mj: float
    peak_fluence_j_cm2: float
    # The estimate says what it is wherever it is shown (API answers, the form, reports).
    label: str = "idealised diffraction-limited estimate, not a measurement"


def numerical_aperture(cone_angle_deg: float) -> float:
    """NA in air for a beam converging at the full cone angle given."""
    return math.sin(math.radians(cone_angle_deg) / 2.0)


def airy_diameter_um(wavelength_nm: float, na: float) -> float:
    """Diffraction-limited spot diameter (to the first dark ring), in micrometres."""
    return 1.22 * (wavelength_nm / _NM_PER_UM) / na


def peak_fluence_j_cm2(pulse_energy_mj: float, wavelength_nm: float, na: float) -> float:
    """Idealised peak fluence at the centre of the Airy pattern, in J/cm2."""
    wavelength_cm = wavelength_nm * _CM_PER_NM
    return pulse_energy_mj * _J_PER_MJ * math.pi * na**2 / wavelength_cm**2


def fluence_gain(from_cone_deg: float, to_cone_deg: float) -> float:
    """How many times the peak fluence rises when the cone angle widens (same energy)."""
    return (numerical_aperture(to_cone_deg) / numerical_aperture(from_cone_deg)) ** 2


def focal_spot(
    wavelength_nm: float, cone_angle_deg: float, pulse_energy_mj: float, *, assumed: bool
) -> FocalSpot:
    """The idealised focus for a pulse of the given energy."""
    na = numerical_aperture(cone_angle_deg)
    return FocalSpot(
        cone_angle_deg=cone_angle_deg,
        cone_angle_assumed=assumed,
        numerical_aperture=na,
        airy_diameter_um=airy_diameter_um(wavelength_nm, na),
        pulse_energy_mj=pulse_energy_mj,
        peak_fluence_j_cm2=peak_fluence_j_cm2(pulse_energy_mj, wavelength_nm, na),
    )

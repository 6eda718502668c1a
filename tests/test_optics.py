"""Idealised focal optics against the standard-optics check values in
../shared/reference/clinical-practice.md (Hecht, Optics: NA = sin(half angle), Airy d = 1.22
lambda / NA, fluence ~ 1/d^2)."""

from __future__ import annotations

import math

import pytest
from scipy.integrate import quad
from scipy.special import j1

from capnote.optics import airy_diameter_um, fluence_gain, focal_spot, numerical_aperture


def test_airy_diameter_at_na_014_is_about_9_3_um() -> None:
    # Check value: lambda = 1.064 um, NA = 0.14 gives about 9.3 um (standard optics).
    assert airy_diameter_um(1064, 0.14) == pytest.approx(9.27, abs=0.05)


def test_cone_16_to_24_degrees_gains_about_2_23() -> None:
    # (sin 12 deg / sin 8 deg)^2 = 2.23 (check value from the trade's cone angles).
    assert fluence_gain(16, 24) == pytest.approx(2.23, abs=0.005)


def test_numerical_aperture_is_sine_of_half_cone() -> None:
    # 16 degree cone without a contact lens: NA = sin 8 deg = 0.139 (standard optics).
    assert numerical_aperture(16) == pytest.approx(math.sin(math.radians(8)))
    assert numerical_aperture(16) == pytest.approx(0.139, abs=0.001)


def test_peak_fluence_scales_with_energy_and_inverse_square_of_spot() -> None:
    # Fluence ~ E / d^2 (standard optics): doubling energy doubles it; a 24 degree cone
    # concentrates it 2.23 times against 16 degrees.
    low = focal_spot(1064, 16, 1.0, assumed=True)
    high = focal_spot(1064, 16, 2.0, assumed=True)
    wide = focal_spot(1064, 24, 1.0, assumed=True)
    assert high.peak_fluence_j_cm2 == pytest.approx(2 * low.peak_fluence_j_cm2)
    assert wide.peak_fluence_j_cm2 / low.peak_fluence_j_cm2 == pytest.approx(2.23, abs=0.005)
    ratio_from_spot = (low.airy_diameter_um / wide.airy_diameter_um) ** 2
    assert wide.peak_fluence_j_cm2 / low.peak_fluence_j_cm2 == pytest.approx(ratio_from_spot)


def test_airy_disk_holds_83_8_percent_of_the_pulse() -> None:
    # Born & Wolf, Principles of Optics: the Airy disk (to the first dark ring) holds 83.8 %
    # of the energy. Integrating F0 * [2 J1(v)/v]^2 over our disk, with our F0 and our d,
    # must give 0.838 E: this checks the peak-fluence and diameter formulas together.
    wavelength_nm, cone, energy_mj = 1064.0, 16.0, 1.5
    spot = focal_spot(wavelength_nm, cone, energy_mj, assumed=True)
    na = spot.numerical_aperture
    wavelength_cm = wavelength_nm * 1e-7
    radius_cm = spot.airy_diameter_um * 1e-4 / 2

    def fluence(r: float) -> float:
        v = 2 * math.pi * na * r / wavelength_cm
        shape = 1.0 if v == 0 else (2 * j1(v) / v) ** 2
        return float(spot.peak_fluence_j_cm2 * shape * 2 * math.pi * r)

    inside_j, _ = quad(fluence, 0, radius_cm)
    assert inside_j / (energy_mj * 1e-3) == pytest.approx(0.838, abs=0.002)


def test_idealised_fluence_exceeds_breakdown_threshold_at_clinical_energy() -> None:
    # Vogel et al., IEEE J Quantum Electron 1996: breakdown in water at 0.76e11 W/cm2 for 6 ns,
    # i.e. 456 J/cm2; clinical settings of 1-2 mJ lie above it even for a 16 degree cone.
    threshold_j_cm2 = 0.76e11 * 6e-9
    assert focal_spot(1064, 16, 1.0, assumed=True).peak_fluence_j_cm2 > threshold_j_cm2

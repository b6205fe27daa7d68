"""The polarization portrait: what its ellipses and maps carry, its JSON document, its PNG."""

from __future__ import annotations

import json

import numpy as np
import pytest

from lightloom.sequencer.analysis.portrait import DARK_FRACTION, portrait, portrait_json
from lightloom.sequencer.optics.states import JOINT_KETS, density, partial_trace
from lightloom.sequencer.optics.stokes import stokes_from_density

matplotlib = pytest.importorskip("matplotlib")

from lightloom.sequencer.present.portrait import ellipse_marks, plot_portrait  # noqa: E402


def test_radial_ellipses_are_lines_along_the_radius_sized_by_intensity() -> None:
    p = portrait(JOINT_KETS["radial"])
    m = ellipse_marks(p)
    assert len(m["x"]) > 20
    azimuth = np.degrees(np.arctan2(m["y"], m["x"]))
    diff = np.mod(m["angle_deg"] - azimuth + 90.0, 180.0) - 90.0
    assert np.abs(diff).max() < 1e-6
    assert (m["handedness"] == 0).all() and np.allclose(m["minor"], 0.0, atol=1e-12)
    # sizes proportional to the local intensity
    intensity = np.exp(-2 * (m["x"] ** 2 + m["y"] ** 2)) * (m["x"] ** 2 + m["y"] ** 2)
    ratio = m["major"] / intensity
    assert np.ptp(ratio) < 1e-9 * ratio.max()


def test_circular_beam_marks_are_right_handed_circles() -> None:
    p = portrait(np.kron(np.array([1, 1j]) / np.sqrt(2), np.array([0.6, 0.8])))
    m = ellipse_marks(p)
    assert (m["handedness"] == 1).all()
    assert np.allclose(m["major"], m["minor"], rtol=1e-9)


def test_json_maps_integrate_to_the_reduced_stokes_vector_and_hide_dark_points() -> None:
    rho = 0.7 * density(JOINT_KETS["hybrid_plus"]) + 0.3 * density(np.kron([1, 0], [0.6, 0.8j]))
    doc = json.loads(json.dumps(portrait_json(portrait(rho, half_width=4.0, points=121))))
    x = np.array(doc["grid"]["x"])
    cell = (x[1] - x[0]) ** 2
    integral = [np.nansum(np.array(doc[k], dtype=float)) * cell for k in ("S0", "S1", "S2", "S3")]
    assert np.allclose(integral, stokes_from_density(partial_trace(rho, "polarization")), atol=1e-5)
    s0 = np.array(doc["S0"], dtype=float)
    dark = s0 <= DARK_FRACTION * s0.max()
    assert dark.any()
    assert all(doc["dop"][i][j] is None for i, j in zip(*np.nonzero(dark)))


def test_portrait_png_is_written(tmp_path) -> None:
    rho = 0.9 * density(JOINT_KETS["azimuthal"]) + 0.1 * np.eye(4) / 4
    out = plot_portrait(portrait(rho), tmp_path / "p" / "portrait.png", title="our scenario")
    assert out.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"

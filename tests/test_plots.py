"""Figures of `analyze --plots`: PNG files, and the drawn artists carry exactly the data given."""

from __future__ import annotations

import struct
import sys
from pathlib import Path

import numpy as np
import pytest

matplotlib = pytest.importorskip("matplotlib")

from matplotlib.colors import Normalize  # noqa: E402
from mpl_toolkits.mplot3d import proj3d  # noqa: E402

from lightloom.sequencer.present import plots  # noqa: E402

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
JOINT_LABELS = ("H,h", "H,v", "V,h", "V,v")


def png_size(path: Path) -> tuple[int, int]:
    """(width, height) in pixels from the IHDR chunk, after checking the PNG signature."""
    head = path.read_bytes()[:24]
    assert head[:8] == PNG_SIGNATURE
    assert head[12:16] == b"IHDR"
    return struct.unpack(">II", head[16:24])


def radial_vector_beam(purity: float = 0.95) -> np.ndarray:
    """(|H,h> + |V,v>)/sqrt2 mixed with white noise to a purity, plus a small imaginary part."""
    psi = np.array([1, 0, 0, 1]) / np.sqrt(2)
    # tr(rho^2) = w^2 + (1 - w^2)/4 for rho = w |psi><psi| + (1 - w) I/4.
    w = np.sqrt((4 * purity - 1) / 3)
    rho = w * np.outer(psi, psi) + (1 - w) / 4 * np.eye(4)
    rho = rho.astype(complex)
    rho[1, 2] += 0.03j
    rho[2, 1] -= 0.03j
    return rho


@pytest.fixture(scope="module")
def joint_rho() -> np.ndarray:
    return radial_vector_beam()


@pytest.fixture(scope="module")
def drawn_density(joint_rho):
    fig = plots.density_matrix_figure(joint_rho, JOINT_LABELS, "radial vector beam")
    fig.canvas.draw()
    return fig


def test_radial_beam_fixture_has_the_purity_asked_for(joint_rho):
    assert np.trace(joint_rho @ joint_rho).real == pytest.approx(0.95, abs=0.003)


@pytest.mark.parametrize("d, labels", [(2, ("H", "V")), (4, JOINT_LABELS), (6, tuple("abcdef"))])
def test_density_matrix_plot_writes_a_png_of_the_figure_size(tmp_path, d, labels):
    rho = np.eye(d, dtype=complex) / d
    out = plots.plot_density_matrix(rho, labels, tmp_path / f"rho{d}.png", title="t", dpi=100)
    assert out == tmp_path / f"rho{d}.png"
    width, height = png_size(out)
    assert 600 <= width <= 2000 and 300 <= height <= 1200
    assert out.stat().st_size > 10_000


def test_bar_faces_reach_from_zero_to_each_element_at_its_row_and_column():
    values = np.array([[0.5, -0.25], [0.125, 0.0]])
    faces = plots.bar_faces(values, width=0.5)
    assert faces.shape == (4, 6, 4, 3)
    for k, ((i, j), v) in enumerate(np.ndenumerate(values)):
        z = faces[k, ..., 2]
        assert z.min() == pytest.approx(min(v, 0.0)) and z.max() == pytest.approx(max(v, 0.0))
        assert faces[k, 1, :, 2] == pytest.approx(np.full(4, max(v, 0.0)))
        assert faces[k, ..., 0].mean() == pytest.approx(j)
        assert faces[k, ..., 1].mean() == pytest.approx(i)


def _bar_collection(ax):
    (coll,) = [c for c in ax.collections if (c.get_gid() or "").startswith("bars:")]
    return coll


def test_drawn_bar_tops_sit_at_the_matrix_elements(drawn_density, joint_rho):
    axes3d = [ax for ax in drawn_density.axes if ax.name == "3d"]
    assert len(axes3d) == 2
    for ax, part in zip(axes3d, (joint_rho.real, joint_rho.imag)):
        paths = [p.vertices[:4] for p in _bar_collection(ax).get_paths()]
        assert len(paths) == 6 * part.size
        tops = plots.bar_faces(part)[:, 1]
        for (i, j), top in zip(np.ndindex(part.shape), tops):
            # Project where the top of bar (i, j) must be, and find a drawn polygon there.
            x, y, _ = proj3d.proj_transform(top[:, 0], top[:, 1], top[:, 2], ax.M)
            expected = np.column_stack([x, y])
            assert any(np.allclose(p, expected, atol=1e-9) for p in paths), (i, j)


def test_bar_tops_are_coloured_on_one_scale_shared_with_the_colour_bar(drawn_density, joint_rho):
    limit = plots.symmetric_limit(joint_rho.real, joint_rho.imag)
    cax = drawn_density.axes[-1]
    assert cax.get_ylim() == pytest.approx((-limit, limit))
    cmap, norm = matplotlib.colormaps["RdBu_r"], Normalize(-limit, limit)
    axes3d = [ax for ax in drawn_density.axes if ax.name == "3d"]
    for ax, part in zip(axes3d, (joint_rho.real, joint_rho.imag)):
        coll = _bar_collection(ax)
        paths = [p.vertices[:4] for p in coll.get_paths()]
        colours = coll.get_facecolor()
        for top, v in zip(plots.bar_faces(part)[:, 1], part.ravel()):
            x, y, _ = proj3d.proj_transform(top[:, 0], top[:, 1], top[:, 2], ax.M)
            k = next(k for k, p in enumerate(paths) if np.allclose(p, np.column_stack([x, y])))
            assert colours[k] == pytest.approx(np.asarray(cmap(norm(v))))


def test_density_bars_have_symmetric_z_limits_covering_every_element(drawn_density, joint_rho):
    peak = np.max(np.abs(np.concatenate([joint_rho.real.ravel(), joint_rho.imag.ravel()])))
    for ax in (ax for ax in drawn_density.axes if ax.name == "3d"):
        lo, hi = ax.get_zlim()
        assert lo == pytest.approx(-hi) and hi >= peak


def test_density_axes_are_labelled_with_the_basis_kets(drawn_density):
    ax = next(ax for ax in drawn_density.axes if ax.name == "3d")
    kets = ["|H,h⟩", "|H,v⟩", "|V,h⟩", "|V,v⟩"]
    assert [t.get_text() for t in ax.get_xticklabels()] == kets
    assert [t.get_text() for t in ax.get_yticklabels()] == kets


def test_heat_map_variant_shows_real_and_imaginary_parts_above_four_dimensions():
    rng = np.random.default_rng(7)
    a = rng.normal(size=(6, 6)) + 1j * rng.normal(size=(6, 6))
    rho = a @ a.conj().T
    rho /= np.trace(rho)
    fig = plots.density_matrix_figure(rho, [str(k) for k in range(6)])
    images = [im for ax in fig.axes for im in ax.get_images()]
    assert [im.get_gid() for im in images] == ["map:Re ρ", "map:Im ρ"]
    assert np.asarray(images[0].get_array()) == pytest.approx(rho.real)
    assert np.asarray(images[1].get_array()) == pytest.approx(rho.imag)
    assert images[0].norm.vmin == images[1].norm.vmin == -images[0].norm.vmax


def test_density_matrix_with_wrong_label_count_is_refused():
    with pytest.raises(ValueError, match="4 basis labels"):
        plots.density_matrix_figure(np.eye(4) / 4, ("H", "V"))


def _stokes_line(ax):
    (line,) = [ln for ln in ax.get_lines() if (ln.get_gid() or "").startswith("stokes:")]
    return line


def test_poincare_plot_writes_a_png(tmp_path):
    out = plots.plot_poincare({"polarization": [0.3, 0.5, 0.7]}, tmp_path / "p.png", dpi=100)
    width, height = png_size(out)
    assert 400 <= width <= 1500 and 400 <= height <= 1500


def test_poincare_vector_ends_at_the_stokes_vector_given():
    fig = plots.poincare_figure({"polarization": [0.3, 0.5, 0.7]})
    xs, ys, zs = _stokes_line(fig.axes[0]).get_data_3d()
    assert (xs[0], ys[0], zs[0]) == (0, 0, 0)
    assert (xs[-1], ys[-1], zs[-1]) == pytest.approx((0.3, 0.5, 0.7))


def test_poincare_vector_of_a_four_component_stokes_vector_is_normalised_by_s0():
    # Arrow length = degree of polarization |S| / S0: common practice, no source.
    fig = plots.poincare_figure({"spatial": [2.0, 0.6, 1.0, 1.4]})
    xs, ys, zs = _stokes_line(fig.axes[0]).get_data_3d()
    assert (xs[-1], ys[-1], zs[-1]) == pytest.approx((0.3, 0.5, 0.7))


def test_poincare_spheres_get_one_subplot_each_with_pole_labels_chosen_by_key():
    fig = plots.poincare_figure({"polarization": [0, 0, 1], "spatial": [1, 0, 0]})
    assert len(fig.axes) == 2
    pol = {t.get_text() for t in fig.axes[0].texts}
    spa = {t.get_text() for t in fig.axes[1].texts}
    assert {"H (S1)", "V", "D (S2)", "A", "R (S3)", "L"} <= pol
    assert {"h (S1)", "v", "d (S2)", "a", "ℓ+ (S3)", "ℓ−"} <= spa


def test_poincare_pole_labels_can_be_given_per_sphere():
    poles = {"mode": (("x", "y"), ("p", "m"), ("cw", "ccw"))}
    fig = plots.poincare_figure({"mode": [0, 1, 0]}, poles=poles, axis_labels=("a", "b", "c"))
    shown = {t.get_text() for t in fig.axes[0].texts}
    assert {"x (a)", "y", "p (b)", "m", "cw (c)", "ccw"} <= shown


def test_poincare_uncertainty_adds_a_ball_around_the_tip():
    bare = plots.poincare_figure({"polarization": [0.3, 0.5, 0.7]})
    with_ball = plots.poincare_figure(
        {"polarization": [0.3, 0.5, 0.7]}, uncertainties={"polarization": 0.05}
    )
    assert len(with_ball.axes[0].collections) == len(bare.axes[0].collections) + 1
    assert "± 0.050" in with_ball.axes[0].get_title()


def test_poincare_refuses_a_stokes_vector_of_the_wrong_length():
    with pytest.raises(ValueError, match="3 or 4 components"):
        plots.poincare_figure({"polarization": [0.1, 0.2]})


def _reference_lines(fig):
    ax = fig.axes[0]
    return ax, {ln.get_label(): ln for ln in ax.get_lines()}


def test_reference_trace_plot_writes_a_png(tmp_path):
    t = np.arange(0, 600.0, 10.0)
    out = plots.plot_reference_trace(t, 1e-3 + 1e-6 * np.sin(t), tmp_path / "r.png", dpi=100)
    width, height = png_size(out)
    assert (width, height) == (900, 440)


def test_reference_trace_is_shown_in_percent_of_its_first_reading():
    t = np.array([100.0, 160.0, 220.0, 280.0])
    ref = np.array([2.0e-3, 2.02e-3, 1.98e-3, 2.1e-3])
    ax, lines = _reference_lines(plots.reference_trace_figure(t, ref))
    assert lines["reference"].get_xdata() == pytest.approx(t - 100.0)
    assert lines["reference"].get_ydata() == pytest.approx([0.0, 1.0, -1.0, 5.0])


def test_reference_trace_highlights_flagged_readings():
    t = np.arange(5.0)
    ref = np.array([1.0, 1.0, 0.5, 1.0, 1.1])
    flagged = np.array([False, False, True, False, True])
    fig = plots.reference_trace_figure(t, ref, flagged=flagged, units="counts")
    _, lines = _reference_lines(fig)
    marks = lines["flagged (2)"]
    assert marks.get_xdata() == pytest.approx([2.0, 4.0])
    assert marks.get_ydata() == pytest.approx([-50.0, 10.0])


def test_reference_events_are_vertical_lines_with_labels_that_do_not_overlap():
    t = np.arange(0, 4 * 3600.0, 60.0)
    events = [
        (3600.0, "beam lost"),
        (3660.0, "resumed after pause"),
        (3700.0, "gain"),
        (7200.0, "sweep 2"),
    ]
    fig = plots.reference_trace_figure(t, 1 + 0.001 * np.cos(t / 900), events=events)
    ax = fig.axes[0]
    vertical = [
        ln for ln in ax.get_lines() if len(set(ln.get_xdata())) == 1 and ln.get_linestyle() == "--"
    ]
    assert sorted(ln.get_xdata()[0] for ln in vertical) == [3600.0, 3660.0, 3700.0, 7200.0]
    fig.canvas.draw()
    renderer = fig.canvas.get_renderer()
    labels = list(ax.texts)
    # Long labels are cut to 18 characters so that they stay short on the plot.
    shown = sorted(tx.get_text().strip() for tx in labels)
    assert shown == ["beam lost", "gain", "resumed after pau…", "sweep 2"]
    boxes = [tx.get_window_extent(renderer) for tx in labels]
    for a in range(4):
        for b in range(a + 1, 4):
            assert not boxes[a].overlaps(boxes[b]), (labels[a].get_text(), labels[b].get_text())
    axes_box = ax.get_window_extent(renderer)
    assert all(axes_box.x0 <= bx.x0 and bx.x1 <= axes_box.x1 + 1 for bx in boxes)


def test_long_reference_trace_has_hours_minutes_on_the_time_axis():
    t = np.arange(0, 5.5 * 3600, 120.0)
    fig = plots.reference_trace_figure(t, np.ones_like(t))
    ax = fig.axes[0]
    fig.canvas.draw()
    assert ax.get_xlabel() == "elapsed time (h:mm)"
    shown = [tl.get_text() for tl in ax.get_xticklabels() if tl.get_text()]
    assert "1:00" in shown and "5:00" in shown


def test_short_reference_trace_keeps_seconds():
    fig = plots.reference_trace_figure(np.arange(0, 90.0, 5.0), np.ones(18))
    assert fig.axes[0].get_xlabel() == "elapsed time (s)"


def test_elapsed_time_formats():
    assert plots.format_elapsed(5400.0, "h:mm") == "1:30"
    assert plots.format_elapsed(3599.0, "h:mm") == "1:00"
    assert plots.format_elapsed(125.0, "m:ss") == "2:05"


def test_label_rows_stack_only_labels_that_would_collide():
    rows = plots.label_rows([0.10, 0.12, 0.50, 0.13, 0.95], [0.1, 0.1, 0.1, 0.1, 0.1])
    assert list(rows) == [0, 1, 0, 2, 0]


def test_reference_trace_with_no_usable_reading_is_refused():
    with pytest.raises(ValueError, match="no finite non-zero"):
        plots.reference_trace_figure(np.arange(3.0), np.zeros(3))


def test_readings_plot_shows_each_port_over_the_step_index(tmp_path):
    steps = np.arange(6)
    values = np.array(
        [[1e-3, 2e-3], [1.5e-3, 0.5e-3], [1e-7, 1e-7], [1e-3, 1e-3], [2e-3, 0.0], [1e-3, 1e-3]]
    )
    kinds = ["measure", "measure", "background", "reference", "measure", "measure"]
    fig = plots.readings_figure(steps, values, ["A", "B"], kinds=kinds)
    for p, ax in enumerate(fig.axes):
        measured = next(ln for ln in ax.get_lines() if ln.get_label() == "measure")
        assert measured.get_xdata() == pytest.approx([0, 1, 4, 5])
        assert measured.get_ydata() * 1e-3 == pytest.approx(values[[0, 1, 4, 5], p])
        assert ax.get_ylabel() == f"{'AB'[p]}\n(mW)"
    out = plots.plot_readings(steps, values, ["A", "B"], tmp_path / "raw.png", kinds=kinds, dpi=100)
    assert png_size(out)[0] == 900


def test_missing_parent_directories_are_created(tmp_path):
    out = plots.plot_poincare({"polarization": [1, 0, 0]}, tmp_path / "a" / "b" / "s.png", dpi=60)
    assert out.is_file() and png_size(out)[0] > 0
    assert [p.name for p in out.parent.iterdir()] == ["s.png"]


def test_plotting_changes_no_global_matplotlib_state(tmp_path):
    # Compare copies: reading "backend" from the global rcParams would itself pick a backend.
    before = matplotlib.rcParams.copy()
    plots.plot_reference_trace(np.arange(4.0), np.ones(4), tmp_path / "r.png", dpi=60)
    assert matplotlib.rcParams.copy() == before


def test_missing_matplotlib_raises_plots_unavailable_with_the_install_hint(tmp_path, monkeypatch):
    for name in [n for n in sys.modules if n.split(".")[0] in ("matplotlib", "mpl_toolkits")]:
        monkeypatch.setitem(sys.modules, name, None)
    monkeypatch.setitem(sys.modules, "matplotlib", None)
    with pytest.raises(plots.PlotsUnavailable, match=r"pip install 'lightloom\[plots\]'") as caught:
        plots.plot_density_matrix(np.eye(2) / 2, ("H", "V"), tmp_path / "rho.png")
    assert caught.value.exit_status == 2
    assert not (tmp_path / "rho.png").exists()

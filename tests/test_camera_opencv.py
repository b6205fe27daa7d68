"""The camera device kind and its OpenCV family: known frames written to a video file and to an
image sequence come back through cv2.VideoCapture; region of interest, binning, averaging and the
saturation mask; bench and registry wiring; the vendor-SDK adapter of docs/camera.md."""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pytest

cv2 = pytest.importorskip("cv2")

from lightloom.drivers.camera import (  # noqa: E402
    Camera, CameraSettings, Frame, Roi, average_frames, crop_and_bin, settings_from_options,
)
from lightloom.drivers.camera_opencv import OpenCVCamera  # noqa: E402
from lightloom.drivers.errors import DeviceFault  # noqa: E402
from lightloom.drivers.options import DriverConfigError  # noqa: E402
from lightloom.drivers.registry import create_device  # noqa: E402
from lightloom.sequencer.errors import InputError  # noqa: E402
from lightloom.sequencer.lang.bench import parse_bench  # noqa: E402


def known_frames(n: int, shape: tuple[int, int] = (24, 32)) -> list[np.ndarray]:
    """Distinct 8-bit frames: a ramp whose slope and offset change from frame to frame."""
    rows, cols = np.indices(shape)
    return [((rows * (i + 2) + cols * 3 + 17 * i) % 251).astype(np.uint8) for i in range(n)]


def write_video(path: Path, frames: list[np.ndarray]) -> None:
    height, width = frames[0].shape
    writer = cv2.VideoWriter(str(path), cv2.VideoWriter_fourcc(*"FFV1"), 10, (width, height), False)
    assert writer.isOpened(), "this OpenCV build cannot write FFV1 (lossless) video"
    for f in frames:
        writer.write(f)
    writer.release()


def test_video_file_frames_come_back_exactly(tmp_path):
    frames = known_frames(4)
    write_video(tmp_path / "known.avi", frames)
    camera = create_device("cam", "opencv.camera", str(tmp_path / "known.avi"), {}, None)
    assert isinstance(camera, Camera)
    camera.connect()
    got = [camera.read_frame(frames=1) for _ in frames]
    camera.close()
    for want, frame in zip(frames, got):
        np.testing.assert_array_equal(frame.data, want.astype(float))
        assert frame.data.shape == (24, 32) and frame.n_averaged == 1


def test_sixteen_bit_image_sequence_is_read_at_full_depth(tmp_path):
    frames = [f.astype(np.uint16) * 257 for f in known_frames(3)]
    for i, f in enumerate(frames):
        assert cv2.imwrite(str(tmp_path / f"img_{i:03d}.png"), f)
    times = iter([100.0, 101.0, 102.0, 103.0])
    camera = OpenCVCamera(
        "cam", str(tmp_path / "img_%03d.png"), CameraSettings(bit_depth=16), clock=lambda: next(times)
    )
    got = [camera.read_frame(frames=1) for _ in frames]
    assert [f.t_s for f in got] == [100.0, 101.0, 102.0]
    for want, frame in zip(frames, got):
        np.testing.assert_array_equal(frame.data, want.astype(float))
    with pytest.raises(DeviceFault, match="no frame"):
        camera.read_frame(frames=1)


def test_frames_to_average_average_consecutive_frames_and_rewind(tmp_path):
    frames = known_frames(3)
    write_video(tmp_path / "known.avi", frames)
    camera = create_device("cam", "opencv.camera", str(tmp_path / "known.avi"),
                           {"frames_to_average": 3, "rewind": True}, None)
    first = camera.read_frame()
    expected = np.mean([f.astype(float) for f in frames], axis=0)
    np.testing.assert_allclose(first.data, expected)
    np.testing.assert_allclose(camera.read_frame().data, expected)  # rewound at the end
    camera.close()


def test_region_of_interest_and_binning_are_applied_after_capture(tmp_path):
    frames = known_frames(1)
    write_video(tmp_path / "known.avi", frames)
    camera = create_device(
        "cam", "opencv.camera", str(tmp_path / "known.avi"),
        {"roi": [4, 2, 10, 8], "binning": 2}, None,
    )
    frame = camera.read_frame()
    cut = frames[0][2:10, 4:14].astype(float)
    np.testing.assert_allclose(frame.data, cut.reshape(4, 2, 5, 2).mean(axis=(1, 3)))


def test_saturation_mask_marks_binned_pixels_with_any_raw_pixel_at_the_level():
    raw = np.zeros((4, 4))
    raw[0, 1] = 255
    raw[3, 3] = 254
    settings = CameraSettings(binning=2)
    frame = average_frames([raw, np.zeros((4, 4))], settings, t_s=0.0)
    np.testing.assert_array_equal(frame.saturated, [[True, False], [False, False]])
    np.testing.assert_allclose(frame.data, [[255 / 4 / 2, 0], [0, 254 / 4 / 2]])
    assert frame.saturation_level == 255.0
    lowered = average_frames([raw], CameraSettings(binning=2, saturation_level=200), 0.0)
    assert lowered.saturated.sum() == 2


def test_crop_outside_the_sensor_is_refused():
    with pytest.raises(ValueError, match="does not fit"):
        crop_and_bin(np.zeros((10, 10)), Roi(5, 5, 8, 2), 1)


@pytest.mark.parametrize(
    ("options", "key"),
    [({"exposure_s": -1}, "exposure_s"), ({"binning": 1.5}, "binning"), ({"bit_depth": 40}, "bit_depth"),
     ({"roi": [0, 0, 4]}, "roi"), ({"saturation_level": 300}, "saturation_level")],
)
def test_bad_camera_options_name_their_key(options, key):
    with pytest.raises(DriverConfigError) as caught:
        settings_from_options(options)
    assert caught.value.key == key


def test_opencv_camera_needs_an_address_and_knows_its_options():
    with pytest.raises(DriverConfigError, match="needs an address"):
        create_device("cam", "opencv.camera", None, {}, None)
    with pytest.raises(DriverConfigError, match="unknown option 'exposure'"):
        create_device("cam", "opencv.camera", "0", {"exposure": 1}, None)


BENCH = """\
bench: camera-table
wavelength_nm: 780
devices:
  shutter: {driver: visa.shutter, address: 'TCPIP::127.0.0.1::5000::SOCKET'}
  cam: {driver: DRIVER, ADDRESS options: {exposure_s: 0.002, bit_depth: 12}}
roles:
  shutter: shutter
  detectors: [{device: cam, splitter_port: H}]
optics:
  polarizing_splitter: {extinction: 1.0e-3}
"""


def test_bench_accepts_opencv_cameras_and_refuses_other_families():
    bench = parse_bench(BENCH.replace("DRIVER", "opencv.camera").replace("ADDRESS", "address: '0',"), "b.yaml")
    assert bench.devices["cam"].kind == "camera" and bench.devices["cam"].is_detector
    for driver in ("visa.camera", "opencv.power_meter"):
        with pytest.raises(InputError) as caught:
            parse_bench(BENCH.replace("DRIVER", driver).replace("ADDRESS", "address: '0',"), "b.yaml")
        assert caught.value.line == 5


def test_vendor_adapter_example_in_the_docs_builds_a_camera_through_the_plugin_hook():
    docs = (Path(__file__).resolve().parents[1] / "docs" / "camera.md").read_text()
    code = re.search(r"```python\n(# vendor_camera\.py.*?)```", docs, re.S)
    assert code, "docs/camera.md lost its example adapter"
    namespace: dict = {}
    exec(compile(code.group(1), "vendor_camera.py", "exec"), namespace)
    camera = create_device(
        "cam", "acme.camera", "serial-1234", {"exposure_s": 0.004}, None,
        plugins={"acme.camera": lambda: namespace["make_camera"]},
    )
    assert isinstance(camera, Camera)
    camera.connect()
    frame = camera.read_frame(frames=2)
    assert isinstance(frame, Frame) and frame.data.shape == (8, 6) and frame.exposure_s == 0.004
    camera.close()

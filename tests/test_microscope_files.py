"""Microscope files written by rosettasciio's own writers, read back through laueline."""

import json
import math

import numpy as np
import pytest
from conftest import run_cli
from physical_render import PhysicalSettings, render_physical
from scipy import constants

from laueline import read_crystal
from laueline.errors import InputError
from laueline.images.render import RenderSettings, render_pattern
from laueline.io.microscope import (iter_pattern_chunks, mrad_per_pixel, open_microscope_file,
                                    read_pattern)

SI = read_crystal("Si")


def wavelength_codata_A(kv):
    """Relativistic wavelength from CODATA constants (scipy.constants), written out here
    independently of laueline.optics: lambda = h / sqrt(2 m e V (1 + e V / 2 m c^2))."""
    ev = constants.e * kv * 1e3
    p = math.sqrt(2 * constants.m_e * ev * (1 + ev / (2 * constants.m_e * constants.c ** 2)))
    return constants.h / p * 1e10


def signal_dict(data, axes, metadata=None, original=None):
    """A signal in the dictionary form rosettasciio's writers take."""
    metadata = {"General": {"title": "pattern"}, "Signal": {"signal_type": ""}, **(metadata or {})}
    return {"data": data, "axes": axes, "metadata": metadata,
            "original_metadata": original or {}, "tmp_parameters": {},
            "attributes": {"_lazy": False}, "learning_results": {}, "models": {},
            "package_info": {"name": "", "version": ""}}


def axis(name, size, scale, units, navigate, offset=0.0):
    return {"name": name, "size": size, "scale": scale, "offset": offset, "units": units,
            "navigate": navigate}


@pytest.fixture(scope="module")
def small_pattern():
    image, _ = render_pattern(SI, (2, 3, 0), 200, 6, RenderSettings(shape=(128, 128), seed=3),
                              x_axis=(0, 0, 4))
    return image


def test_hspy_scan_lazy_with_calibration(tmp_path, small_pattern):
    from rsciio.hspy import file_writer

    # a 3 x 4 scan of 128 x 128 patterns, 0.02 1/nm per pixel, 300 kV, camera length 80 mm
    data = np.stack([small_pattern + k for k in range(12)]).reshape(3, 4, 128, 128)
    axes = [axis("y", 3, 2.5, "nm", True), axis("x", 4, 2.5, "nm", True),
            axis("ky", 128, 0.02, "1/nm", False), axis("kx", 128, 0.02, "1/nm", False)]
    md = {"Acquisition_instrument": {"TEM": {"beam_energy": 300.0, "camera_length": 80.0}}}
    file_writer(str(tmp_path / "scan.hspy"), signal_dict(data.astype(np.uint16), axes, md),
                chunks=(1, 2, 128, 128))
    opened = open_microscope_file(tmp_path / "scan.hspy")
    assert hasattr(opened.data, "compute")  # lazy: a dask array
    meta = opened.metadata
    assert meta.kv == 300.0 and meta.camera_length_mm == 80.0
    # t = lambda q: 0.02 1/nm = 0.002 1/A per pixel (reciprocal lengths without 2 pi)
    expected = 1.0 / (0.002 * wavelength_codata_A(300.0) * 1e3)
    # 1e-9: the two wavelength routes differ only by rounding
    assert meta.scale_px_per_mrad == pytest.approx(expected, rel=1e-9)
    assert [(a.name, a.size, a.scale, a.units) for a in meta.navigation] == \
        [("y", 3, 2.5, "nm"), ("x", 4, 2.5, "nm")]
    assert opened.saturation == 65535
    # one pattern by flat index and by navigation index
    read = read_pattern(tmp_path / "scan.hspy", index=6)
    np.testing.assert_array_equal(read.image, data[1, 2])
    np.testing.assert_array_equal(read_pattern(tmp_path / "scan.hspy", index=(2, 3)).image,
                                  data[2, 3])
    # chunks one at a time, covering the scan once
    total = np.zeros((3, 4))
    for slices, block in iter_pattern_chunks(opened):
        assert block.shape[:2] == (1, 2)  # the stored chunk, not the whole scan
        total[slices] += block.sum(axis=(-1, -2))
    np.testing.assert_allclose(total, data.sum(axis=(-1, -2)))
    with pytest.raises(InputError, match="12 patterns"):
        read_pattern(tmp_path / "scan.hspy")
    with pytest.raises(InputError, match="index"):
        read_pattern(tmp_path / "scan.hspy", index=12)


def test_hspy_override_is_reported(tmp_path, small_pattern):
    from rsciio.hspy import file_writer

    axes = [axis("ky", 128, 0.5, "mrad", False), axis("kx", 128, 0.5, "mrad", False)]
    md = {"Acquisition_instrument": {"TEM": {"beam_energy": 200.0}}}
    file_writer(str(tmp_path / "p.hspy"), signal_dict(small_pattern, axes, md))
    read = read_pattern(tmp_path / "p.hspy")
    assert read.metadata.scale_px_per_mrad == pytest.approx(2.0)  # 0.5 mrad per pixel
    read = read_pattern(tmp_path / "p.hspy", kv=120, scale_px_per_mrad=2.5)
    assert read.metadata.kv == 120 and read.metadata.scale_px_per_mrad == 2.5
    text = read.metadata.text()
    assert "120 kV from the command line, not the file's 200 kV" in text
    assert "2.5 px/mrad from the command line, not the file's 2 px/mrad" in text


def test_ncem_emd_reciprocal_angstrom(tmp_path, small_pattern):
    from rsciio.emd import file_writer

    # rosettasciio writes the Berkeley (NCEM) flavour; it keeps axis scales and units
    axes = [axis("ky", 128, 0.004, "1/A", False), axis("kx", 128, 0.004, "1/A", False)]
    file_writer(str(tmp_path / "p.emd"), signal_dict(small_pattern.astype(np.float32), axes))
    read = read_pattern(tmp_path / "p.emd", kv=200)
    expected = 1.0 / (0.004 * wavelength_codata_A(200.0) * 1e3)
    assert read.metadata.scale_px_per_mrad == pytest.approx(expected, rel=1e-6)  # float32 axis
    np.testing.assert_allclose(read.image, small_pattern.astype(np.float32))
    # without a voltage the reciprocal pixel size stays unconverted, with a warning
    meta = read_pattern(tmp_path / "p.emd").metadata
    assert meta.scale_px_per_mrad is None and "voltage" in meta.warnings[0]


def test_blockfile_detector_length_and_camera_length(tmp_path, small_pattern):
    from rsciio.blockfile import file_writer

    # blockfiles store the detector pixel in cm and the camera length in the header;
    # rosettasciio's own mapping turns the header value into mm (factor 1e-4)
    data = np.stack([small_pattern, small_pattern])
    data = np.clip(data / data.max() * 250, 0, 255).astype(np.uint8)
    axes = [axis("x", 2, 1.0, "nm", True), axis("dy", 128, 0.0025, "cm", False),
            axis("dx", 128, 0.0025, "cm", False)]
    header = {"Beam_energy": 200000, "Camera_length": 2500000, "Note": ""}
    file_writer(str(tmp_path / "s.blo"), signal_dict(data, axes,
                                                     original={"blockfile_header": header}),
                show_progressbar=False)
    read = read_pattern(tmp_path / "s.blo", index=1)
    meta = read.metadata
    assert meta.kv == pytest.approx(200.0) and meta.camera_length_mm == pytest.approx(250.0)
    # 0.025 mm pixel over a 250 mm camera length: 0.1 mrad per pixel
    assert meta.scale_px_per_mrad == pytest.approx(10.0, rel=1e-6)
    np.testing.assert_array_equal(read.image, data[1])


def write_zspy(path, signal, zarr_format):
    """rosettasciio's own zspy writer class on a zarr group opened here.

    Its ``file_writer`` builds a zarr-2 ``NestedDirectoryStore``, which zarr 3
    removed; the group is opened here (in the zarr-2 or zarr-3 format) and the
    writer's class fills it exactly as ``file_writer`` does.
    """
    import numcodecs
    import zarr
    from rsciio.zspy._api import ZspyWriter

    group = zarr.open_group(store=str(path), mode="w", zarr_format=zarr_format)
    group.attrs["file_format"] = "ZSpy"
    group.attrs["file_format_version"] = "3.3"
    experiment = group.require_group("Experiments").require_group("pattern")
    # the writer's default Blosc codec is a zarr-2 compressor
    compressor = numcodecs.Blosc(cname="zstd", clevel=1) if zarr_format == 2 else None
    ZspyWriter(group, signal, experiment, chunks=None, compressor=compressor,
               write_dataset=True, show_progressbar=False).write()


@pytest.mark.parametrize("zarr_format", [2, 3])
def test_zspy_scan_read_only(tmp_path, small_pattern, zarr_format):
    data = np.stack([small_pattern, small_pattern + 7.0])
    axes = [axis("scan", 2, 4.0, "nm", True), axis("ky", 128, 0.01, "1/nm", False),
            axis("kx", 128, 0.01, "1/nm", False)]
    md = {"Acquisition_instrument": {"TEM": {"beam_energy": 200.0, "camera_length": 120.0}}}
    path = tmp_path / "p.zspy"
    write_zspy(path, signal_dict(data, axes, md), zarr_format)
    # a store on a read-only disk still opens: laueline asks the reader for mode 'r'
    for item in [path, *path.rglob("*")]:
        item.chmod(0o555 if item.is_dir() else 0o444)
    opened = open_microscope_file(path)
    meta = opened.metadata
    expected = 1.0 / (0.001 * wavelength_codata_A(200.0) * 1e3)  # t = lambda q, q in 1/A
    assert meta.scale_px_per_mrad == pytest.approx(expected, rel=1e-9)
    assert meta.kv == 200.0 and meta.camera_length_mm == 120.0
    assert [(a.name, a.size, a.scale, a.units) for a in meta.navigation] == \
        [("scan", 2, 4.0, "nm")]
    np.testing.assert_array_equal(read_pattern(path, index=1).image, data[1])


def test_velox_emd_built_from_its_published_layout(tmp_path, small_pattern):
    """A Velox EMD file (HDF5) with the groups the format defines: /Version (JSON),
    /Data/Image/<id>/Data as (rows, cols, frames) and /Data/Image/<id>/Metadata as
    JSON bytes, one column per frame; SI units (V, m, 1/m) as Velox writes them."""
    import h5py

    frames = np.stack([small_pattern, small_pattern[::-1]], axis=-1).astype(np.uint16)
    meta = {"BinaryResult": {"PixelSize": {"width": "2e7", "height": "2e7"},
                             "PixelUnitX": "1/m", "PixelUnitY": "1/m",
                             "Offset": {"x": "0", "y": "0"}, "DetectorIndex": "0"},
            "Detectors": {"Detector-0": {"DetectorName": "BM-Ceta", "ExposureTime": "0.5"}},
            "Optics": {"AccelerationVoltage": "300000", "CameraLength": "0.245"},
            "Acquisition": {}, "CustomProperties": {}, "Scan": {}}
    raw = np.frombuffer(json.dumps(meta).encode(), np.uint8)
    path = tmp_path / "velox.emd"
    with h5py.File(path, "w") as f:
        f["Version"] = np.array([json.dumps({"format": "Velox", "version": "11"}).encode()])
        image = f.create_group("Data/Image/6a2e3e4f")
        image.create_dataset("Data", data=frames, chunks=frames.shape[:2] + (1,))  # per frame
        image["Metadata"] = np.repeat(raw[:, None], 2, axis=1)
    opened = open_microscope_file(path)
    meta = opened.metadata
    assert meta.reader == "emd" and meta.kv == pytest.approx(300.0)
    assert meta.camera_length_mm == pytest.approx(245.0)  # the reader's m -> mm
    # 2e7 1/m = 0.002 1/A per pixel; t = lambda q
    expected = 1.0 / (0.002 * wavelength_codata_A(300.0) * 1e3)
    # 1e-9 relative: the reader converts 1/m to a compact unit in floating point
    assert meta.scale_px_per_mrad == pytest.approx(expected, rel=1e-9)
    assert opened.navigation_shape == (2,)
    np.testing.assert_array_equal(read_pattern(path, index=1).image, frames[..., 1])


def write_mib(path, frames, times_ms):
    """Quantum Detectors Merlin frames: each a 384-byte comma-separated ASCII header
    (as the Merlin manual defines it: id, sequence number, header size, chips, width,
    height, pixel type, geometry, ..., timestamp, exposure in ns, bit depth) then the
    frame as big-endian integers."""
    out = bytearray()
    for k, (frame, ms) in enumerate(zip(frames, times_ms)):
        rows, cols = frame.shape
        stamp = f"2024-05-06T10:00:{ms / 1000:012.9f}Z"
        fields = ["MQ1", f"{k + 1:06d}", "00384", "01", f"{cols:04d}", f"{rows:04d}", "U16",
                  "   1x1", "01", "2024-05-06 10:00:00.000000", "0.001000", "0", "0", "0",
                  "1.000000E+1", stamp, "1000000ns", "12", ""]
        header = ",".join(fields).encode().ljust(384, b"\0")
        out += header + frame.astype(">u2").tobytes()
    path.write_bytes(bytes(out))


def test_mib_scan_built_from_its_published_layout(tmp_path, small_pattern):
    # a 2 x 3 scan: rows start 10 ms apart, frames 1 ms apart, which is how the
    # reader finds the line length when no .hdr file is beside the data
    frames = np.stack([small_pattern + k for k in range(6)]).astype(np.uint16)
    write_mib(tmp_path / "scan.mib", frames, [0, 1, 2, 10, 11, 12])
    opened = open_microscope_file(tmp_path / "scan.mib")
    assert opened.navigation_shape == (2, 3)
    meta = opened.metadata
    # a Merlin file carries no voltage and no camera calibration
    assert meta.kv is None and meta.scale_px_per_mrad is None
    assert "no calibration" in meta.text()
    # rosettasciio returns Merlin frames upside down with respect to the stored rows
    np.testing.assert_array_equal(read_pattern(tmp_path / "scan.mib", index=(1, 2)).image,
                                  frames[5][::-1])
    read = read_pattern(tmp_path / "scan.mib", index=4, kv=200, scale_px_per_mrad=12.5)
    assert read.metadata.scale_px_per_mrad == 12.5 and read.metadata.overrides


def write_mrc(path, stack, cell_A=(0.0, 0.0, 0.0)):
    """An MRC2014 file: the 1024-byte header of the published standard (NX NY NZ,
    MODE, start, MX MY MZ, cell lengths in A, ..., 'MAP ' and the machine stamp)
    followed by the data, mode 1 (16-bit signed)."""
    nz, ny, nx = stack.shape
    header = np.zeros(256, "<i4")
    header[0:4] = nx, ny, nz, 1
    header[7:10] = nx, ny, nz
    header[10:13] = np.array(cell_A, "<f4").view("<i4")
    header[16:19] = 1, 2, 3  # column, row, section axes
    raw = bytearray(header.tobytes())
    raw[208:212] = b"MAP "
    raw[212:214] = b"\x44\x44"  # little-endian stamp
    path.write_bytes(bytes(raw) + stack.astype("<i2").tobytes())


def test_mrc_stack_without_camera_calibration(tmp_path, small_pattern):
    stack = np.stack([small_pattern, small_pattern * 0.5]).astype(np.int16)
    write_mrc(tmp_path / "p.mrc", stack)
    opened = open_microscope_file(tmp_path / "p.mrc")
    assert opened.navigation_shape == (2,)
    meta = opened.metadata
    # the MRC cell is a real-space size: no px/mrad taken from it, a warning instead
    assert meta.scale_px_per_mrad is None and "real-space" in meta.warnings[0]
    np.testing.assert_array_equal(read_pattern(tmp_path / "p.mrc", index=1).image, stack[1])
    with pytest.raises(InputError, match="2 patterns"):
        read_pattern(tmp_path / "p.mrc")


def _dm_value(value):
    """(info words, little-endian payload) of a DigitalMicrograph data tag."""
    import struct

    if isinstance(value, str):  # text is stored as an array of 16-bit characters
        chars = np.frombuffer(value.encode("utf-16-le"), "<u2")
        return [20, 4, len(chars)], chars.tobytes()
    if isinstance(value, bool):
        return [8], struct.pack("<?", value)
    if isinstance(value, int):
        return [3], struct.pack("<i", value)
    if isinstance(value, float):
        return [7], struct.pack("<d", value)
    code = {np.dtype("<u2"): 4, np.dtype("<f4"): 6}[value.dtype]
    return [20, code, value.size], value.tobytes()  # an array of a simple type


def _dm_group(tags, version):
    import struct

    n = "q" if version == 4 else "i"
    entries = bytearray()
    for name, value in tags.items():
        label = b"" if name.startswith("_") else name.encode()  # "_k": unnamed
        if isinstance(value, dict):
            body = _dm_group(value, version)
            kind = 20
        else:
            info, payload = _dm_value(value)
            body = b"%%%%" + struct.pack(f">{n}", len(info)) + \
                struct.pack(">" + n * len(info), *info) + payload
            kind = 21
        entries += struct.pack(">bh", kind, len(label)) + label
        entries += (struct.pack(">q", len(body)) if version == 4 else b"") + body
    return struct.pack(f">bb{n}", 0, 0, len(tags)) + bytes(entries)


def write_dm(path, tags, version):
    """A DigitalMicrograph tag file as its structure is published (from memory: C.
    Boothroyd's description of DM3; DM4 widens counts and sizes to 8 bytes): a
    big-endian header (version, size, byte-order flag), then nested tag groups
    (sorted and open flags, tag count) of named tags, each data tag a '%%%%'
    delimiter, a big-endian type description and the value in the file's byte
    order (little-endian here)."""
    import struct

    body = _dm_group(tags, version)
    size = struct.pack(">q" if version == 4 else ">i", len(body))
    path.write_bytes(struct.pack(">i", version) + size + struct.pack(">i", 1) + body
                     + b"\0" * 8)


@pytest.mark.parametrize("version", [3, 4])
def test_digitalmicrograph_file_built_from_its_published_structure(tmp_path, small_pattern,
                                                                   version):
    pattern = small_pattern[:, :96].astype("<u2")  # not square: rows and columns kept apart

    def calibration(scale, units):
        return {"Origin": 0.0, "Scale": scale, "Units": units}

    tags = {"ImageList": {"_0": {
        "ImageData": {
            "Calibrations": {"Brightness": calibration(1.0, "Counts"),
                             "Dimension": {"_0": calibration(0.015, "1/nm"),
                                           "_1": calibration(0.015, "1/nm")},
                             "DisplayCalibratedUnits": True},
            # DataType 10: unsigned 16-bit; dimensions listed columns first
            "Data": pattern.ravel(), "DataType": 10, "Dimensions": {"_0": 96, "_1": 128},
            "PixelDepth": 2},
        # in TEM diffraction DigitalMicrograph keeps the camera length (mm) where an
        # image keeps its magnification
        "ImageTags": {"Microscope Info": {"Voltage": 200000.0, "Indicated Magnification": 310.0,
                                          "Illumination Mode": "TEM",
                                          "Imaging Mode": "DIFFRACTION"}},
        "Name": "pattern"}}}
    path = tmp_path / f"p.dm{version}"
    write_dm(path, tags, version)
    read = read_pattern(path)
    np.testing.assert_array_equal(read.image, pattern)
    meta = read.metadata
    assert meta.reader == "digitalmicrograph" and meta.detector_shape == (128, 96)
    assert meta.kv == pytest.approx(200.0)  # the reader's V -> kV
    assert meta.camera_length_mm == pytest.approx(310.0)
    expected = 1.0 / (0.0015 * wavelength_codata_A(200.0) * 1e3)  # t = lambda q
    assert meta.scale_px_per_mrad == pytest.approx(expected, rel=1e-9)


def test_unit_conversions():
    # 1/nm and 1/A differ by ten; rad and urad against mrad; detector lengths over L
    lam = wavelength_codata_A(200.0)
    assert mrad_per_pixel(0.1, "1/nm", kv=200) == pytest.approx(0.01 * lam * 1e3, rel=1e-9)
    assert mrad_per_pixel(0.01, "Å^-1", kv=200) == pytest.approx(0.01 * lam * 1e3, rel=1e-9)
    assert mrad_per_pixel(2e-5, "rad") == pytest.approx(0.02)
    assert mrad_per_pixel(20, "µrad") == pytest.approx(0.02)
    assert mrad_per_pixel(0.001, "deg") == pytest.approx(math.radians(0.001) * 1e3, rel=1e-12)
    assert mrad_per_pixel(0.015, "mm", camera_length_mm=150) == pytest.approx(0.1)
    # Velox writes 1/m, MRC-style axes nm^-1: the same reciprocal length
    assert mrad_per_pixel(1e8, "1/m", kv=200) == pytest.approx(0.01 * lam * 1e3, rel=1e-9)
    assert mrad_per_pixel(0.1, "nm^-1", kv=200) == pytest.approx(0.01 * lam * 1e3, rel=1e-9)
    with pytest.raises(InputError, match="nm"):
        mrad_per_pixel(0.1, "nm")  # a real-space image, not a pattern
    with pytest.raises(InputError, match="voltage"):
        mrad_per_pixel(0.1, "1/nm")


def test_bad_files(tmp_path, small_pattern):
    from rsciio.hspy import file_writer

    (tmp_path / "junk.dm4").write_bytes(b"not a DigitalMicrograph file")
    with pytest.raises(InputError, match="rosettasciio cannot read it"):
        read_pattern(tmp_path / "junk.dm4")
    file_writer(str(tmp_path / "line.hspy"),
                signal_dict(np.arange(100.0), [axis("e", 100, 1.0, "eV", False)]))
    with pytest.raises(InputError, match="no image"):
        read_pattern(tmp_path / "line.hspy")
    axes = [axis("ky", 128, 0.01, "furlong", False), axis("kx", 128, 0.01, "furlong", False)]
    file_writer(str(tmp_path / "odd.hspy"), signal_dict(small_pattern, axes))
    with pytest.raises(InputError, match="cannot be converted"):
        read_pattern(tmp_path / "odd.hspy")
    # the caller's scale makes the file's units irrelevant
    assert read_pattern(tmp_path / "odd.hspy", scale_px_per_mrad=20).metadata.scale_px_per_mrad \
        == 20
    big = np.zeros((4100, 16), np.uint8)
    np.save(tmp_path / "big.npy", big)
    with pytest.raises(InputError, match="4096"):
        read_pattern(tmp_path / "big.npy")
    assert read_pattern(tmp_path / "big.npy", allow_large=True).image.shape == (4100, 16)


def test_cli_detect_reads_a_scan(tmp_path, capsys):
    from rsciio.hspy import file_writer

    image, _ = render_pattern(SI, (2, 3, 0), 200, 6, RenderSettings(shape=(256, 256), seed=4),
                              x_axis=(0, 0, 4))
    data = np.stack([image, image[::-1]]).astype(np.uint16)
    axes = [axis("scan", 2, 5.0, "nm", True), axis("ky", 256, 0.01, "1/nm", False),
            axis("kx", 256, 0.01, "1/nm", False)]
    md = {"Acquisition_instrument": {"TEM": {"beam_energy": 200.0}}}
    path = tmp_path / "scan.hspy"
    file_writer(str(path), signal_dict(data, axes, md))
    code, out, err = run_cli(capsys, "detect", path, "--json", tmp_path / "d.json")
    assert code == 2 and "--index" in err and len(err.strip().splitlines()) == 1
    assert not (tmp_path / "d.json").exists()
    code, out, err = run_cli(capsys, "detect", path, "--index", 1, "--kv", 300,
                             "--json", tmp_path / "d.json")
    assert code == 0, err
    assert "voltage 300 kV from the command line, not the file's 200 kV" in out
    doc = json.loads((tmp_path / "d.json").read_text())
    assert doc["file"]["kv"] == 300 and doc["file"]["kv_file"] == 200
    assert doc["file"]["index"] == [1]
    expected = 1.0 / (0.001 * wavelength_codata_A(300.0) * 1e3)
    assert doc["file"]["scale_px_per_mrad"] == pytest.approx(expected, rel=1e-9)


def test_tiff_with_calibration_tags(tmp_path, small_pattern):
    from rsciio.tiff import file_writer

    # rosettasciio's TIFF writer keeps the axis scale and units (not the voltage)
    axes = [axis("ky", 128, 0.025, "1/nm", False), axis("kx", 128, 0.025, "1/nm", False)]
    file_writer(str(tmp_path / "p.tif"), signal_dict(small_pattern.astype(np.uint16), axes))
    meta = read_pattern(tmp_path / "p.tif", kv=120).metadata
    expected = 1.0 / (0.0025 * wavelength_codata_A(120.0) * 1e3)  # t = lambda q
    # 1e-6: the TIFF resolution tags hold the scale as a rational of 32-bit integers
    assert meta.reader == "tiff" and meta.scale_px_per_mrad == pytest.approx(expected, rel=1e-6)
    # a plain TIFF (tifffile, default resolution tags) still reads, uncalibrated
    import tifffile

    tifffile.imwrite(tmp_path / "plain.tif", small_pattern.astype(np.uint16))
    read = read_pattern(tmp_path / "plain.tif")
    assert read.metadata.scale_px_per_mrad is None
    np.testing.assert_array_equal(read.image, small_pattern.astype(np.uint16))


@pytest.fixture(scope="module")
def bad_files(tmp_path_factory, small_pattern):
    """Files a user may hand over that cannot give one calibrated pattern."""
    from rsciio.hspy import file_writer

    folder = tmp_path_factory.mktemp("bad")
    (folder / "junk.dm4").write_bytes(b"not a DigitalMicrograph file")
    (folder / "junk.emd").write_bytes(b"\x89HDF\r\n\x1a\n but cut short")
    file_writer(str(folder / "spectrum.hspy"),
                signal_dict(np.arange(100.0), [axis("e", 100, 1.0, "eV", False)]))
    axes = [axis("ky", 128, 0.01, "furlong", False), axis("kx", 128, 0.01, "furlong", False)]
    file_writer(str(folder / "odd.hspy"), signal_dict(small_pattern, axes))
    axes4 = [axis("y", 2, 1.0, "nm", True), axis("x", 2, 1.0, "nm", True),
             axis("ky", 128, 0.01, "1/nm", False), axis("kx", 128, 0.01, "1/nm", False)]
    md = {"Acquisition_instrument": {"TEM": {"beam_energy": 200.0}}}
    file_writer(str(folder / "scan4d.hspy"),
                signal_dict(np.stack([small_pattern] * 4).reshape(2, 2, 128, 128), axes4, md))
    calibration = {"schema": "laueline.fit/2", "kv": 200.0, "disk_mrad": 6.0,
                   "structure": {"name": "Si"}, "zone": [2, 3, 0],
                   "detector": {"center_px": [64.0, 64.0], "scale_px_per_mrad": 8.0,
                                "rotation_deg": 0.0, "mirror": False}}
    (folder / "cal.json").write_text(json.dumps(calibration))
    return folder


@pytest.mark.parametrize("name, message", [
    ("junk.dm4", "rosettasciio cannot read it"), ("junk.emd", "rosettasciio cannot read it"),
    ("spectrum.hspy", "no image"), ("odd.hspy", "cannot be converted"),
    ("scan4d.hspy", "--index")])
def test_cli_bad_files_one_line_exit_2(bad_files, tmp_path, capsys, name, message):
    path = bad_files / name
    out_json = tmp_path / "out.json"
    commands = [["detect", path, "--json", out_json],
                ["refine", "Si", "--zone", 2, 3, 0, "--image", path, "--json", out_json]]
    if name != "scan4d.hspy":  # a 4-D file is what map wants
        commands.append(["map", "Si", "--zone", 2, 3, 0, "--scan", path, "--calibration",
                         bad_files / "cal.json", "--out", tmp_path / "m.zarr", "--quiet"])
    for argv in commands:
        code, out, err = run_cli(capsys, *argv)
        assert code == 2, (argv[0], err)
        assert len(err.strip().splitlines()) == 1 and message in err, (argv[0], err)
        assert "Traceback" not in err
        assert not out_json.exists() and not (tmp_path / "m.zarr").exists()


def test_cli_refine_takes_the_files_calibration(tmp_path, capsys):
    from rsciio.hspy import file_writer

    # a pattern drawn by the test renderer at a known camera scale, stored with the
    # reciprocal pixel size that scale means at 200 kV: q = 1 / (scale lambda)
    image, truth = render_physical(SI, (2, 3, 0), 200, 6, PhysicalSettings(seed=5),
                                   x_axis=(0, 0, 4))
    q_inv_nm = 10.0 / (truth["scale_px_per_mrad"] * 1e3 * wavelength_codata_A(200.0))
    axes = [axis("ky", 320, q_inv_nm, "1/nm", False), axis("kx", 320, q_inv_nm, "1/nm", False)]
    md = {"Acquisition_instrument": {"TEM": {"beam_energy": 200.0, "camera_length": 250.0}}}
    file_writer(str(tmp_path / "ref.hspy"), signal_dict(image.astype(np.uint16), axes, md))
    code, out, err = run_cli(capsys, "refine", "Si", "--zone", 2, 3, 0, "--x-axis", 0, 0, 4,
                             "--image", tmp_path / "ref.hspy", "--model", "fixed",
                             "--rotation-deg", 23, "--json", tmp_path / "cal.json")
    assert code == 0, err
    assert "from the file: voltage 200 kV" in out and "px/mrad" in out
    doc = json.loads((tmp_path / "cal.json").read_text())
    # the scale converted from the file is the renderer's (1e-9: rounding only)
    assert doc["file"]["scale_px_per_mrad"] == pytest.approx(truth["scale_px_per_mrad"],
                                                             rel=1e-9)
    assert doc["kv"] == 200.0 and doc["file"]["camera_length_mm"] == 250.0
    # and the fit, started there, keeps it within its uncertainty (3 sigma)
    sigma = doc["detector"]["sigma"]["scale_px_per_mrad"]
    assert abs(doc["detector"]["scale_px_per_mrad"] - truth["scale_px_per_mrad"]) < 3 * sigma

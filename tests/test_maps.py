"""Strain maps over scans: accuracy, uncertainty, resuming, clusters, bad input.

The scans are drawn by the pattern renderer (:mod:`laueline.images.render`),
which puts lines on the exact loci by its own route (pixel-wise distances
from the loci, blur and Poisson noise); the map's measurement (profiles
across predicted lines, parabola minima, linear fit) shares none of that
code, so agreement with the rendered truth tests the measurement, not a
model against itself.
"""

from __future__ import annotations

import os
import shutil
import signal
import subprocess
import sys
import time

import numpy as np
import pytest

from laueline.cli import main
from laueline.crystal import read_crystal
from laueline.detector import Detector
from laueline.errors import InputError
from laueline.images.render import RenderSettings, render_pattern
from laueline.maps import fit_pattern, map_strain, open_scan, plan_scan, scan_from_array
from laueline.strain import from_voigt, sample_axes, voigt

ZONE, X_AXIS, KV, DISK = (2, 3, 0), (0, 0, 4), 198.6, 6.0
SHAPE = (256, 256)


def _green_lagrange(e):
    F = np.eye(3) + from_voigt(e)
    return voigt(0.5 * (F.T @ F - np.eye(3)))


def _render(si, strain, seed, dose=4000):
    settings = RenderSettings(shape=SHAPE, rotation_deg=23.0, seed=seed, dose=dose)
    image, truth = render_pattern(si, ZONE, KV, DISK, settings, x_axis=X_AXIS, strain=strain)
    return image.astype(np.float32), truth


@pytest.fixture(scope="module")
def setup():
    si = read_crystal("Si")
    _, truth = _render(si, None, 1)
    d = truth["detector"]
    det = Detector(tuple(d["center_px"]), d["scale_px_per_mrad"], d["rotation_deg"], d["mirror"])
    axes = sample_axes(si.basis, (1, 1, 0), (0, 0, 1))
    reference, _ = _render(si, None, 7)
    # no kinematic-bias floor: these kinematic renders have no dynamical shifts, so
    # the totals are the statistical part plus the reference's measurement noise
    plan = plan_scan(si, ZONE, (KV, det), SHAPE, disk_mrad=DISK, x_axis=X_AXIS,
                     sample_axes=axes, reference=reference, systematic_covariance=None)
    return si, det, axes, plan


@pytest.fixture(scope="module")
def line_scan(setup):
    """A step and a gradient in the sample frame across 12 patterns (invented profile)."""
    si, _, axes, _ = setup
    n = 12
    position = np.arange(n)
    sample = np.zeros((n, 6))
    sample[:, 0] = np.where(position < 6, -1.5e-3, 0.5e-3)          # a step in e'xx
    sample[:, 2] = np.linspace(-0.5e-3, 1.0e-3, n)                   # a gradient in e'zz
    crystal_e = np.array([voigt(axes.T @ from_voigt(s) @ axes) for s in sample])
    images = np.stack([_render(si, e, 100 + i)[0] for i, e in enumerate(crystal_e)])
    truth = np.array([_green_lagrange(e) for e in crystal_e])
    return images, truth


def test_line_scan_within_reported_uncertainty(setup, line_scan):
    _, _, axes, plan = setup
    images, truth = line_scan
    ds = map_strain(images, plan, n_workers=1, progress=False)
    assert ds["ok"].values.all()
    names = ("exx", "eyy", "ezz", "eyz", "exz", "exy")
    value = np.stack([ds[n].values for n in names], axis=1)
    sigma = np.stack([ds[f"sigma_{n}"].values for n in names], axis=1)
    z = (value - truth) / sigma
    # Gaussian errors: about 5 % of 72 normalised errors beyond 2; allow 10 %
    # for the small sample, and none beyond 4
    assert np.mean(np.abs(z) > 2) <= 0.10
    assert np.all(np.abs(z) < 4)
    # the sample-frame components are the same tensor rotated
    rotated = np.stack([ds[f"sample_{n}"].values for n in names], axis=1)
    expected = np.array([voigt(axes @ from_voigt(v) @ axes.T) for v in value])
    np.testing.assert_allclose(rotated, expected, atol=1e-12)
    # the step in e'xx is resolved: the two plateaus differ by far more than
    # their combined uncertainty (2e-3 step)
    sxx = ds["sample_exx"].values
    ssig = ds["sigma_sample_exx"].values
    step = np.mean(sxx[6:]) - np.mean(sxx[:6])
    step_sigma = np.sqrt(np.sum(ssig ** 2)) / 6
    assert abs(step - 2e-3) < 3 * step_sigma


@pytest.mark.slow
def test_sigma_matches_scatter(setup):
    """Monte Carlo: the reported statistical sigma against the scatter over noise seeds."""
    si, _, _, plan = setup
    e = np.array([0.5e-3, -0.3e-3, 0.2e-3, 0.0, 0.1e-3, -0.2e-3])
    fits = [fit_pattern(_render(si, e, 500 + k)[0], plan) for k in range(40)]
    strain = np.array([f.strain for f in fits])
    sigma = np.array([np.sqrt(np.diag(f.covariance_statistical)) for f in fits])
    ratio = np.median(sigma, axis=0) / np.std(strain, axis=0, ddof=1)
    # 40 trials estimate a standard deviation to about 11 % (1/sqrt(2 n));
    # the reported sigma may be conservative (the per-line term and the
    # Birge scaling only inflate), so accept 0.7 to 1.6
    assert np.all(ratio > 0.7) and np.all(ratio < 1.6), ratio


def _copy_interrupted(src, dst, regions_to_reset):
    """A copy of a finished store as a run killed before those chunks would leave it."""
    import zarr

    shutil.copytree(src, dst)
    group = zarr.open_group(str(dst), mode="r+")
    for region in regions_to_reset:
        for name in group.array_keys():
            if name in ("scan", "scan_x", "scan_y"):
                continue
            array = group[name]
            fill = False if array.dtype == bool else (0 if array.dtype.kind == "i" else np.nan)
            array[region] = fill


def test_store_resumes_to_identical_result(setup, line_scan, tmp_path):
    import xarray as xr

    _, _, _, plan = setup
    images, _ = line_scan
    np.save(tmp_path / "scan.npy", images)
    scan = open_scan(tmp_path / "scan.npy", chunk_patterns=4, step_nm=2.5)
    full = map_strain(scan, plan, out=tmp_path / "full.zarr", n_workers=1, progress=False).load()
    assert list(full["scan"].values[:3]) == [0.0, 2.5, 5.0]
    _copy_interrupted(tmp_path / "full.zarr", tmp_path / "part.zarr", [(slice(4, 12),)])
    part = xr.open_zarr(tmp_path / "part.zarr", consolidated=False)
    assert not part["completed"].values[4:].any()
    resumed = map_strain(scan, plan, out=tmp_path / "part.zarr", n_workers=1, progress=False)
    for name in full.data_vars:
        np.testing.assert_array_equal(resumed[name].values, full[name].values)
    # a store of another scan is refused, and started afresh only when forced
    other = open_scan(tmp_path / "scan.npy", chunk_patterns=3)
    with pytest.raises(InputError, match="another scan"):
        map_strain(other, plan, out=tmp_path / "full.zarr", n_workers=1, progress=False)
    forced = map_strain(other, plan, out=tmp_path / "full.zarr", force=True, n_workers=1,
                        progress=False)
    np.testing.assert_array_equal(forced["exx"].values, full["exx"].values)


def test_local_cluster_equals_default_run(setup, line_scan):
    distributed = pytest.importorskip("distributed")
    _, _, _, plan = setup
    images, _ = line_scan
    scan = scan_from_array(images[:6], chunk_patterns=2)
    default = map_strain(scan, plan, progress=False)
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=None) as cluster, \
            distributed.Client(cluster) as client:
        remote = map_strain(scan, plan, scheduler=client, progress=False)
    for name in default.data_vars:
        np.testing.assert_array_equal(remote[name].values, default[name].values)


def test_unreadable_patterns_are_marked_and_counted(setup, line_scan, tmp_path):
    from laueline.images.io import write_image

    _, _, _, plan = setup
    images, _ = line_scan
    folder = tmp_path / "scan"
    folder.mkdir()
    for i in range(4):
        write_image(folder / f"p{i:02d}.tif", images[i])
    (folder / "p02.tif").write_bytes(b"not a tiff")
    scan = open_scan(folder, chunk_patterns=1)
    ds = map_strain(scan, plan, n_workers=1, progress=False)
    assert ds.attrs["n_unreadable"] == 1
    assert list(ds["ok"].values) == [True, True, False, True]
    assert np.isnan(ds["exx"].values[2])


def test_kinematic_bias_floor_enters_the_totals(setup):
    si, det, axes, _ = setup
    plan = plan_scan(si, ZONE, (KV, det), SHAPE, disk_mrad=DISK, x_axis=X_AXIS)
    # the floor of laueline.dynamical for fits with a calibration held: 2e-4 a component
    np.testing.assert_allclose(np.sqrt(np.diag(plan.systematic_covariance)), 2e-4)


def test_pattern_size_must_match_the_calibration(setup):
    _, _, _, plan = setup
    with pytest.raises(InputError, match="patterns are 128 x 128 px"):
        map_strain(np.zeros((2, 128, 128), np.float32), plan, progress=False)


def _calibration(tmp_path, truth_det, structure="Si", zone=ZONE):
    import json

    doc = {"schema": "laueline.fit/1", "structure": {"name": structure}, "zone": list(zone),
           "x_axis": list(X_AXIS), "kv": KV, "disk_mrad": DISK, "converged": True,
           "detector": truth_det}
    path = tmp_path / "cal.json"
    path.write_text(json.dumps(doc))
    return path


def test_cli_refuses_a_calibration_of_another_zone(setup, line_scan, tmp_path, capsys):
    _, det, _, _ = setup
    images, _ = line_scan
    np.save(tmp_path / "scan.npy", images[:2])
    cal = _calibration(tmp_path, det.as_dict(), zone=(3, 4, 0))
    code = main(["map", "Si", "--zone", "2", "3", "0", "--scan", str(tmp_path / "scan.npy"),
                 "--calibration", str(cal), "--out", str(tmp_path / "r.zarr"), "--quiet"])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1 and "zone" in err[0]
    assert not (tmp_path / "r.zarr").exists()


@pytest.mark.slow
def test_killed_run_resumes_to_the_uninterrupted_result(setup, line_scan, tmp_path):
    """A real interruption: SIGKILL while chunks are being written, then the same command."""
    import xarray as xr

    _, det, _, _ = setup
    images, _ = line_scan
    stack = np.concatenate([images] * 3)  # 36 patterns in 18 chunks
    np.save(tmp_path / "scan.npy", stack)
    cal = _calibration(tmp_path, det.as_dict())
    args = ["map", "Si", "--zone", "2", "3", "0", "--x-axis", "0", "0", "4",
            "--scan", str(tmp_path / "scan.npy"), "--calibration", str(cal),
            "--chunk-patterns", "2", "--workers", "1", "--quiet"]
    env = dict(os.environ, PYTHONPATH=os.pathsep.join(sys.path))
    proc = subprocess.Popen([sys.executable, "-m", "laueline.cli", *args, "--out",
                             str(tmp_path / "killed.zarr")], env=env,
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    deadline = time.time() + 60
    killed_part_way = False
    while time.time() < deadline and proc.poll() is None:
        try:
            done = xr.open_zarr(tmp_path / "killed.zarr", consolidated=False)["completed"].values
        except Exception:
            done = np.zeros(1, bool)
        if 0 < done.sum() < done.size:
            os.kill(proc.pid, signal.SIGKILL)
            proc.wait()
            killed_part_way = True
            break
        time.sleep(0.02)
    proc.wait()
    assert main([*args, "--out", str(tmp_path / "killed.zarr")]) == 0
    assert main([*args, "--out", str(tmp_path / "clean.zarr")]) == 0
    killed = xr.open_zarr(tmp_path / "killed.zarr", consolidated=False)
    clean = xr.open_zarr(tmp_path / "clean.zarr", consolidated=False)
    for name in clean.data_vars:
        np.testing.assert_array_equal(killed[name].values, clean[name].values)
    if not killed_part_way:
        pytest.skip("the run finished before it could be interrupted")


def test_microscope_file_scan_matches_the_array(setup, line_scan, tmp_path):
    """A line scan written by rosettasciio's own writer, read lazily with its step."""
    from rsciio.hspy import file_writer
    from test_microscope_files import axis, signal_dict

    _, _, _, plan = setup
    images, _ = line_scan
    counts = np.round(images[:4]).astype(np.uint16)
    axes = [axis("scan", 4, 7.5, "nm", True), axis("ky", SHAPE[0], 0.02, "1/nm", False),
            axis("kx", SHAPE[1], 0.02, "1/nm", False)]
    md = {"Acquisition_instrument": {"TEM": {"beam_energy": 200.0, "camera_length": 80.0}}}
    file_writer(str(tmp_path / "scan.hspy"), signal_dict(counts, axes, md), chunks=(2,) + SHAPE)
    scan = open_scan(tmp_path / "scan.hspy", chunk_patterns=2)
    assert scan.nav_dims == ("scan",) and scan.nav_coords["scan"][1] == "nm"
    np.testing.assert_allclose(scan.nav_coords["scan"][0], [0.0, 7.5, 15.0, 22.5])
    from_file = map_strain(scan, plan, n_workers=1, progress=False)
    from_array = map_strain(counts.astype(np.float32), plan, n_workers=1, progress=False)
    np.testing.assert_array_equal(from_file["exx"].values, from_array["exx"].values)

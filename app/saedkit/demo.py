"""The demo session: an invented scenario, made by saedkit's own simulator.

Scenario (fictional): *Kestrel Bay Coatings*, coupon KB-7 — a nickel bond
coat on a ferritic steel substrate, examined at 200 kV on a camera binned
2×2 (30 µm pixels) at a nominal camera length of 400 mm. In one session the
operator records

1. ``kb7_au_film.tif`` — an evaporated gold film (the calibration standard),
2. ``kb7_grain_a.tif`` — a grain of the bond coat (the "unknown": fcc Ni along [011]),
3. ``kb7_grain_b.tif`` — a grain of the substrate (the "unknown": bcc α-Fe along [111]).

The instrument's true camera constant is 2.7 % above the nominal one and the
projector lens adds 1.2 % of elliptical distortion at 35°, so the film must
be calibrated before the grains are measured. Everything here is simulated
with :mod:`saedkit.core.simulation.simulate`; the true values are written beside the
images (``*.truth.json``) so the demo can be checked.
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass
from pathlib import Path

__all__ = ["DemoFiles", "DEMO", "write_demo_patterns", "ensure_demo_files", "demo_folder"]


@dataclass(frozen=True)
class _DemoSetup:
    voltage_kv: float = 200.0
    pixel_size_um: float = 30.0
    nominal_camera_length_mm: float = 400.0
    camera_length_error: float = 1.027  # true / nominal
    ellipticity: float = 0.012
    major_axis_deg: float = 35.0
    shape: tuple[int, int] = (1024, 1024)
    calibration_name: str = "KB-7 200 kV CL400 bin2"
    instrument: str = "demo TEM (invented), 2k camera binned 2x2"


DEMO = _DemoSetup()


@dataclass(frozen=True)
class DemoFiles:
    """Paths of the demo patterns and the facts the demo needs."""

    folder: Path
    film: Path
    grain_a: Path
    grain_b: Path
    voltage_kv: float = DEMO.voltage_kv
    pixel_size_um: float = DEMO.pixel_size_um
    nominal_camera_length_mm: float = DEMO.nominal_camera_length_mm
    calibration_name: str = DEMO.calibration_name
    standard: str = "Au"
    grain_phases: tuple[str, ...] = ("Ni", "Fe", "Cu", "Al", "Si")


def _true_camera_constant() -> float:
    from saedkit.core.optics import calculate_camera_constant_px_A

    return calculate_camera_constant_px_A(
        DEMO.nominal_camera_length_mm * DEMO.camera_length_error, DEMO.pixel_size_um, DEMO.voltage_kv)


def write_demo_patterns(folder: str | os.PathLike) -> DemoFiles:
    """Simulate the three demo patterns into ``folder`` (compressed TIFF) with their truth."""
    import numpy as np

    from saedkit.core.distortion import Ellipse
    from saedkit.core.imageio import write_tiff
    from saedkit.core.crystallography.library import find_phase
    from saedkit.core.simulation.render import BeamStop, Detector
    from saedkit.core.simulation.simulate import simulate_ring_pattern, simulate_spot_pattern

    out = Path(folder)
    out.mkdir(parents=True, exist_ok=True)
    K = _true_camera_constant()
    ell = Ellipse(DEMO.ellipticity, DEMO.major_axis_deg)
    det = Detector(counts_per_unit=1.0, read_noise=4.0, offset=100.0)
    meta = dict(pixel_size_um=DEMO.pixel_size_um, voltage_kv=DEMO.voltage_kv,
                camera_length_mm=DEMO.nominal_camera_length_mm)
    stop = BeamStop(angle_deg=118.0, width_px=26.0, transmission=0.03, tip_overhang_px=14.0)

    img, truth = simulate_ring_pattern(
        find_phase("Au"), shape=DEMO.shape, camera_constant_px_A=K, centre_xy=(517.4, 503.8), ellipse=ell,
        voltage_kv=DEMO.voltage_kv, peak_counts=1800.0, ring_width_px=1.8, background_counts=500.0,
        beam_stop=stop, detector=det, rng=np.random.default_rng(7001))
    film = out / "kb7_au_film.tif"
    write_tiff(film, img, **meta)
    (out / "kb7_au_film.truth.json").write_text(json.dumps(truth.to_dict(), indent=1))

    paths = []
    for name, phase, zone, rot, centre, seed in [
        ("kb7_grain_a", "Ni", (0, 1, 1), 31.0, (509.2, 521.6), 7002),
        ("kb7_grain_b", "Fe", (1, 1, 1), -12.5, (522.7, 511.3), 7003),
    ]:
        img, truth = simulate_spot_pattern(
            find_phase(phase), zone, shape=DEMO.shape, camera_constant_px_A=K, rotation_deg=rot,
            centre_xy=centre, ellipse=ell, voltage_kv=DEMO.voltage_kv, thickness_A=80.0, peak_counts=8000.0,
            spot_sigma_px=2.0, min_relative_intensity=3e-3, background_counts=350.0, beam_stop=stop,
            detector=det, rng=np.random.default_rng(seed))
        p = out / f"{name}.tif"
        write_tiff(p, img, **meta)
        (out / f"{name}.truth.json").write_text(json.dumps(truth.to_dict(), indent=1))
        paths.append(p)
    return DemoFiles(out, film, paths[0], paths[1])


def demo_folder() -> Path:
    """Where the demo patterns live: the repository's ``sample_patterns/`` when present, else the data folder."""
    repo = Path(__file__).resolve().parents[2] / "sample_patterns"
    if (repo / "kb7_au_film.tif").is_file():
        return repo
    base = os.environ.get("SAEDKIT_DATA_DIR")
    if not base:
        import platformdirs

        base = platformdirs.user_data_dir("saedkit")
    return Path(base) / "demo"


def ensure_demo_files(folder: str | os.PathLike | None = None, *, calibrate: bool = True) -> DemoFiles:
    """The demo patterns (simulated when missing) and, optionally, their calibration saved in the library.

    With ``calibrate`` the Au film is calibrated and saved under
    ``DEMO.calibration_name`` in the user's calibration library (once).
    """
    f = Path(folder) if folder is not None else demo_folder()
    names = ["kb7_au_film.tif", "kb7_grain_a.tif", "kb7_grain_b.tif"]
    if all((f / n).is_file() for n in names):
        files = DemoFiles(f, f / names[0], f / names[1], f / names[2])
    else:
        files = write_demo_patterns(f)
    if calibrate:
        ensure_demo_calibration(files)
    return files


def ensure_demo_calibration(files: DemoFiles):
    """Calibrate the demo film against Au and save it in the library unless it is there already."""
    from saedkit.core.calibration.calibrate import calibrate_from_rings
    from saedkit.core.calibration.library import CalibrationLibrary, SavedCalibration
    from saedkit.core.errors import LibraryError
    from saedkit.core.imageio import read_pattern
    from saedkit.core.crystallography.library import find_phase
    from saedkit.core.detection.masks import find_auto_mask

    lib = CalibrationLibrary()
    try:
        return lib.get(files.calibration_name)
    except LibraryError:
        pass
    img = read_pattern(files.film)
    mask = find_auto_mask(img.data, saturation_value=img.saturation_value)
    cal = calibrate_from_rings(img, find_phase(files.standard), voltage_kv=files.voltage_kv, mask=mask,
                               pixel_size_um=files.pixel_size_um)
    saved = SavedCalibration.from_calibration(
        cal, name=files.calibration_name, instrument=DEMO.instrument,
        nominal_camera_length_mm=files.nominal_camera_length_mm, binning=2)
    lib.save(saved, overwrite=True)
    return saved

"""The Session: undo/redo of every edit, change notices, measurements, the session file, autosave."""

from __future__ import annotations

import json
import math
import os
import subprocess
import sys

import numpy as np
import pytest

from saedkit.core.detection.centre import manual_centre
from saedkit.core.distortion import Ellipse
from saedkit.core.errors import InputError, SaedkitError
from saedkit.core.imageio import read_pattern, write_tiff
from saedkit.core.crystallography.library import find_phase
from saedkit.core.indexing.matching_types import IndexedSpot, MatchResult, PredictedSpot, ZoneCandidate
from saedkit.core.workflow.session import (
    EnteredCalibration,
    PackedMask,
    Session,
    SessionSettings,
    autosave_path,
    calculate_pair_measurement,
    calculate_spot_measurements,
    find_leftover_autosave,
    find_spot_hkl,
    remove_autosave,
)
from saedkit.core.simulation.simulate import simulate_spot_pattern
from saedkit.core.detection.spots import Spot

K_TRUE = 400.0


def _spot(x, y, s=0.1, i=1000.0):
    return Spot(float(x), float(y), s, s, i, 10.0, 50.0, 200.0, 40.0, 1.6)


@pytest.fixture(scope="module")
def si_pattern(tmp_path_factory):
    """A simulated Si [011] pattern (256 px) written as TIFF, with its truth."""
    img, truth = simulate_spot_pattern(find_phase("Si"), (0, 1, 1), shape=(256, 256), camera_constant_px_A=K_TRUE,
                                       rotation_deg=12.0, rng=np.random.default_rng(11))
    path = tmp_path_factory.mktemp("si") / "si011.tif"
    write_tiff(path, img, voltage_kv=200.0)
    return path, truth


@pytest.fixture
def session(si_pattern):
    return Session(read_pattern(si_pattern[0]))


def _match(centre_xy=(128.0, 128.0)):
    cx, cy = centre_xy
    pred = (PredictedSpot(cx + 50, cy, (1, 1, 1), 3.1356, 1.0), PredictedSpot(cx - 50, cy, (-1, -1, -1), 3.1356, 1.0),
            PredictedSpot(cx, cy + 80, (0, 2, -2), 1.92, 0.6), PredictedSpot(cx, cy - 80, (0, -2, 2), 1.92, 0.6))
    idx = (IndexedSpot(cx + 50, cy, (1, 1, 1), 3.14, 0.01, 0.1, 0.2),)
    cand = ZoneCandidate("Si", (0, 1, 1), None, 0.9, 0.3, 0.4, 12.0, 400.0, 1.0, 1.0, 1, 1, 0, 0.2, idx, pred,
                         notes=("note",))
    cand2 = ZoneCandidate("Cu", (0, 0, 1), None, 0.5, 1.3, 1.4, 2.0, 410.0, 2.0, 0.5, 1, 2, 1, 0.9, (), pred)
    return MatchResult((cand, cand2), None, True, 7, ("Si", "Cu"), {"d_tolerance_pct": 2.5}, ("a note",))


def test_each_edit_undoes_and_redoes(session):
    s = session
    events = []
    s.subscribe(events.append)
    start = s.state
    mask = np.zeros(s.image.shape, bool)
    mask[10:20, 30:40] = True
    edits = [
        (lambda: s.set_centre(manual_centre(128.2, 127.9)), "centre"),
        (lambda: s.add_spot(_spot(170, 120)), "spots"),
        (lambda: s.move_spot(0, _spot(171, 121)), "spots"),
        (lambda: s.set_spots([_spot(60, 60), _spot(196, 196)]), "spots"),
        (lambda: s.delete_spot(1), "spots"),
        (lambda: s.set_mask(mask), "mask"),
        (lambda: s.set_calibration(EnteredCalibration(401.0, 0.5)), "calibration"),
        (lambda: s.set_phases(["Si", "Cu"]), "phases"),
        (lambda: s.set_settings(d_tolerance_pct=3.0), "settings"),
        (lambda: s.set_match(_match()), "match"),
        (lambda: s.choose_candidate(1), "chosen_candidate"),
        (lambda: s.set_camera_constant(399.0, sigma_px_A=0.4), "calibration"),
        (lambda: s.clear_spots(), "spots"),
    ]
    snapshots = [s.state]
    for edit, field in edits:
        n = len(events)
        edit()
        assert len(events) == n + 1 and field in events[-1].changed, field
        snapshots.append(s.state)
    assert s.is_modified and len(s.history_labels) == len(edits)
    for k in range(len(edits), 0, -1):
        assert s.undo()
        assert s.state is snapshots[k - 1]
        assert events[-1].kind == "undo"
    assert s.state is start and not s.can_undo and not s.undo()
    for k in range(1, len(edits) + 1):
        assert s.redo()
        assert s.state is snapshots[k]
    assert not s.redo()
    # a new edit after an undo drops the redo history
    s.undo()
    s.set_centre(manual_centre(100, 100))
    assert not s.can_redo


def test_spot_origins_and_keep_manual(session):
    s = session
    s.add_spot(_spot(100, 100))
    s.set_spots([_spot(60, 60), _spot(100.5, 100.5)])  # the manual spot coincides with a found one: dropped
    assert s.spot_origins == ("auto", "auto")
    s.add_spot(_spot(30, 200))
    s.set_spots([_spot(61, 61)])
    assert s.spot_origins == ("auto", "manual") and s.spots[1].x == 30
    s.move_spot(0, _spot(62, 62))
    assert s.spot_origins == ("manual", "manual")
    with pytest.raises(InputError, match="outside the image"):
        s.add_spot(_spot(-10, 5))
    with pytest.raises(InputError, match="spot index"):
        s.delete_spot(5)


def test_transaction_is_one_step_and_rolls_back(session):
    s = session
    events = []
    s.subscribe(events.append)
    with s.transaction("Calibrate"):
        s.set_calibration(EnteredCalibration(400.0))
        s.set_centre(manual_centre(128, 128))
    assert len(events) == 1 and events[0].changed == {"calibration", "centre"}
    assert s.history_labels == ["Calibrate"]
    with pytest.raises(RuntimeError):
        with s.transaction("Broken"):
            s.set_centre(manual_centre(1, 1))
            raise RuntimeError("boom")
    assert s.centre.x == 128 and s.history_labels == ["Calibrate"]
    s.undo()
    assert s.calibration is None and s.centre is None


def test_match_goes_stale_when_the_input_changes(session):
    s = session
    s.set_match(_match())
    assert s.match_current and s.candidate.phase == "Si"
    s.add_spot(_spot(200, 60))
    assert not s.match_current
    s.undo()
    assert s.match_current
    with pytest.raises(InputError, match="candidate index"):
        s.choose_candidate(2)


def test_replace_initial_mask_is_not_an_edit(session):
    s = session
    m = np.zeros(s.image.shape, bool)
    m[:5] = True
    s.replace_initial_mask(m)
    assert not s.is_modified and not s.can_undo and s.mask.sum() == m.sum()
    s.set_centre(manual_centre(5, 5))
    s.replace_initial_mask(np.zeros(s.image.shape, bool))  # after an edit it is an ordinary step
    assert s.mask.sum() == 0 and s.undo_label == "Automatic mask"


def test_packed_mask_round_trip(rng):
    m = rng.random((300, 301)) < 0.1
    p = PackedMask.from_array(m)
    assert np.array_equal(p.to_array(), m) and p.n_masked == m.sum()
    q = PackedMask.from_dict(json.loads(json.dumps(p.to_dict())))
    assert np.array_equal(q.to_array(), m)
    # a 4096² mask with a beam-stop bar packs to a few kB, so the undo history can hold many
    big = np.zeros((4096, 4096), bool)
    big[2000:2100, 2048:] = True
    assert len(PackedMask.from_array(big).packed) < 50_000


def test_spot_measurements_match_the_camera_equation(session, si_pattern):
    _, truth = si_pattern
    s = session
    s.set_centre(manual_centre(*truth.centre_xy, sigma_px=0.05))
    s.set_calibration(EnteredCalibration(K_TRUE, 0.4))
    r = np.hypot(*(truth.xy - truth.centre_xy).T)
    keep = (r > 20) & (truth.snr > 20)
    s.set_spots([_spot(x, y, 0.05) for x, y in truth.xy[keep]])
    rows = s.measurements()
    d = np.array([m.d_A for m in rows])
    # camera equation R·d = K (DESIGN.md); positions are exact here, so d is the simulated d
    assert d == pytest.approx(truth.d_A[keep], rel=1e-9)
    # σ of R and d against a Monte Carlo (not the propagation formula): draw the spot (σ 0.05 px per
    # axis), the centre (σ 0.05 px per axis) and K (σ 0.4 px·Å), and compute R = |spot − centre|, d = K/R
    m = rows[0]
    rng = np.random.default_rng(21)
    n = 40000
    spot = np.array([m.x, m.y]) + rng.normal(0, 0.05, (n, 2))
    centre = np.array(truth.centre_xy) + rng.normal(0, 0.05, (n, 2))
    R = np.hypot(*(spot - centre).T)
    assert m.radius_sigma_px == pytest.approx(np.std(R), rel=0.02)
    assert m.d_stat_sigma_A == pytest.approx(np.std(rng.normal(K_TRUE, 0.4, n) / R), rel=0.02)
    # the systematic part is the default 1 % reproducibility of K, the total adds the parts in quadrature
    assert m.d_sys_sigma_A == pytest.approx(0.01 * m.d_A, rel=1e-9)
    assert m.d_sigma_A == pytest.approx(math.hypot(m.d_stat_sigma_A, m.d_sys_sigma_A), rel=1e-12)
    assert m.g_per_nm == pytest.approx(10 / m.d_A)
    no_cal = calculate_spot_measurements(s.spots, s.centre, None)
    assert all(math.isnan(x.d_A) for x in no_cal) and no_cal[0].radius_px == pytest.approx(rows[0].radius_px)


def test_measurements_correct_the_ellipse():
    ell = Ellipse(0.02, 30.0)
    c = manual_centre(100, 100, sigma_px=0.0)
    ideal = np.array([[80.0, 0.0], [0.0, 80.0], [-56.57, 56.57]])
    observed = ell.distort_array(ideal) + [100, 100]
    rows = calculate_spot_measurements([_spot(x, y, 0.0) for x, y in observed], c,
                                       EnteredCalibration(400.0, 0.0, ell))
    assert [m.radius_px for m in rows] == pytest.approx(np.hypot(*ideal.T), rel=1e-9)


def test_friedel_pair_cancels_the_centre_error():
    c_true = np.array([200.0, 180.0])
    g = np.array([60.0, 25.0])
    a, b = c_true + g, c_true - g
    wrong_centre = manual_centre(203.0, 178.0)
    cal = EnteredCalibration(K_TRUE, 0.0)
    fr = calculate_pair_measurement(a, b, centre=wrong_centre, calibration=cal, friedel=True,
                                    a_sigma_px=(0.2, 0.2), b_sigma_px=(0.2, 0.2))
    # half the g, −g distance is |g| whatever the centre (common practice)
    assert fr.radius_px == pytest.approx(np.hypot(*g))
    assert fr.d_A == pytest.approx(K_TRUE / np.hypot(*g))
    assert fr.radius_sigma_px == pytest.approx(0.5 * math.hypot(0.2, 0.2))
    single = calculate_spot_measurements([_spot(*a)], wrong_centre, cal)[0]
    assert abs(single.d_A - fr.d_A) / fr.d_A > 0.01  # the single-spot radius carries the centre error
    pair = calculate_pair_measurement(c_true + [80, 0], c_true + [0, 80], centre=manual_centre(*c_true),
                                      calibration=cal)
    assert pair.angle_deg == pytest.approx(90.0)
    assert pair.d_each_A == pytest.approx((K_TRUE / 80, K_TRUE / 80))
    assert pair.distance_px == pytest.approx(80 * math.sqrt(2))


def test_hkl_follows_the_chosen_candidate():
    m = _match()
    cand = m.candidates[0]
    hkl = find_spot_hkl([[178.5, 128.2], [128, 208.4], [10, 10]], cand)
    assert hkl == [(1, 1, 1), (0, 2, -2), None]


def test_save_and_load_give_the_same_state(session, tmp_path):
    s = session
    mask = np.zeros(s.image.shape, bool)
    mask[100:140, 0:30] = True
    s.set_mask(mask)
    s.set_centre(manual_centre(128.25, 127.5, sigma_px=0.3))
    s.add_spot(_spot(170.1, 120.3))
    s.set_spots([_spot(60, 60), Spot(80, 90, 1.0, 1.0, math.nan, math.nan, math.nan, math.nan, math.nan,
                                     math.nan, "click")])
    s.set_calibration(EnteredCalibration(401.5, 0.75, Ellipse(0.01, 20.0)))
    s.set_phases(["Si", "Cu"])
    s.set_settings(max_index=7, pixel_size_um=14.0)
    s.set_match(_match())
    s.choose_candidate(1)
    path = s.save(tmp_path / "a.saedkit.json")
    assert not s.is_modified and s.path == path
    t = Session.load(path)
    assert t.load_warnings == ()
    assert np.array_equal(t.mask, s.mask)
    assert t.centre == s.centre and t.calibration == s.calibration and t.phases == s.phases
    assert t.settings == s.settings and t.chosen_candidate == 1 and t.spot_origins == s.spot_origins
    assert len(t.spots) == 3 and t.spots[0] == s.spots[0] and math.isnan(t.spots[1].intensity)
    assert t.match.to_dict() == s.match.to_dict()
    assert type(t.match.candidates[0].spots[0]) is IndexedSpot
    assert t.candidate.predicted[2].hkl == (0, 2, -2)
    assert not t.is_modified and t.image.sha256 == s.image.sha256
    a = t.to_analysis()
    assert a.spots == t.spots and a.calibration == t.calibration and a.candidate.phase == "Cu"
    assert np.array_equal(a.image.mask, t.mask) and a.parameters["spot_origins"] == list(t.spot_origins)
    t.delete_spot(1)  # the spot placed by hand has no measured intensity (NaN)
    assert json.dumps(t.to_analysis().to_dict(), allow_nan=False)


def test_load_warns_when_the_image_changed_and_fails_when_missing(si_pattern, tmp_path):
    img = read_pattern(si_pattern[0])
    p = tmp_path / "copy.tif"
    write_tiff(p, np.asarray(img.data, dtype=np.uint16))
    s = Session(read_pattern(p))
    s.set_centre(manual_centre(100, 100))
    sess = s.save(tmp_path / "s.saedkit.json")
    data = np.asarray(img.data, dtype=np.uint16).copy()
    data[0, 0] += 1
    write_tiff(p, data)
    t = Session.load(sess)
    assert len(t.load_warnings) == 1 and "SHA-256" in t.load_warnings[0]
    assert t.centre.x == 100
    p.unlink()
    with pytest.raises(SaedkitError, match="was not found"):
        Session.load(sess)
    (tmp_path / "junk.saedkit.json").write_text("{not json")
    with pytest.raises(SaedkitError, match="not a saedkit session"):
        Session.load(tmp_path / "junk.saedkit.json")


def test_session_file_only_builds_saedkit_records(session, tmp_path):
    rec = session.to_record(path=tmp_path / "x.saedkit.json")
    rec["centre"] = {"__type__": "subprocess:Popen", "fields": {"args": ["true"]}}
    (tmp_path / "x.saedkit.json").write_text(json.dumps(rec))
    with pytest.raises(SaedkitError, match="not a saedkit record"):
        Session.load(tmp_path / "x.saedkit.json")


def test_save_needs_an_image_file(tmp_path):
    from saedkit.core.imageio import pattern_from_array

    s = Session(pattern_from_array(np.random.default_rng(0).random((32, 32))))
    with pytest.raises(InputError, match="not read from a file"):
        s.save(tmp_path / "x.saedkit.json")


def test_settings_are_checked():
    with pytest.raises(InputError, match="voltage_kv"):
        SessionSettings(voltage_kv=-1)
    with pytest.raises(InputError, match="max_index"):
        SessionSettings().replace(max_index=0)
    with pytest.raises(InputError, match="unknown setting"):
        SessionSettings().replace(colour="red")
    assert SessionSettings.from_dict({"voltage_kv": 300, "future_key": 1}).voltage_kv == 300


def test_autosave_and_leftover(session, tmp_path):
    s = session
    s.set_centre(manual_centre(50, 50))
    own = autosave_path()
    assert str(own).startswith(os.environ["SAEDKIT_DATA_DIR"])
    s.save(own, mark_saved=False)
    assert s.is_modified  # an autosave does not count as saving
    assert find_leftover_autosave() is None  # ours: this process is running
    # a file left by a process that has ended (a crash)
    dead = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True, text=True)
    pid = int(dead.stdout)
    left = autosave_path(pid)
    s.save(left, mark_saved=False)
    assert find_leftover_autosave() == left
    assert Session.load(left).centre.x == 50
    remove_autosave(left)
    remove_autosave()
    assert find_leftover_autosave() is None


def test_fitted_and_saved_calibrations_survive_the_session_file(session, tmp_path):
    from saedkit.core.calibration.calibrate import Calibration, RingAssignment
    from saedkit.core.calibration.library import SavedCalibration
    from saedkit.core.detection.rings import RadialProfile

    r = np.arange(0.5, 100.5)
    profile = RadialProfile(r, np.exp(-r / 30), np.full(100, np.nan), np.arange(100), 1.0)
    cal = Calibration(401.2, 0.3, Ellipse(0.012, 35.0), centre=manual_centre(128, 127, sigma_px=0.05),
                      voltage_kv=200.0, standard="Au",
                      rings=(RingAssignment((1, 1, 1), 2.3545, 170.4, 0.02, 0.01, 0.006, 8, 55.0),),
                      warnings=("only one ring",), profile=profile)
    s = session
    s.set_calibration(cal, use_centre=True)
    assert s.centre is cal.centre
    t = Session.load(s.save(tmp_path / "c.saedkit.json"))
    assert t.calibration.rings == cal.rings and t.calibration.ellipse == cal.ellipse
    assert np.array_equal(t.calibration.profile.radius_px, r)
    assert np.isnan(t.calibration.profile.sigma).all() and t.calibration.profile.counts.dtype == profile.counts.dtype
    saved = SavedCalibration.from_calibration(cal, name="CL 600", binning=1)
    t.set_calibration(saved)
    u = Session.load(t.save(tmp_path / "d.saedkit.json"))
    assert u.calibration == saved and u.camera_constant[0] == pytest.approx(401.2)


def test_phase_identification_is_undoable_saved_and_exported(session, tmp_path):
    from saedkit.core.indexing.identify import PhaseIdentification, identify_phases

    # first rings of Au (a = 4.0782 Å, Maeland & Flanagan 1964): 111, 200, 220, 311
    d = [2.3545, 2.0391, 1.4419, 1.2296]
    pid = identify_phases(d, [find_phase("Au"), find_phase("Cu"), find_phase("Fe")], intensities=[1, 0.5, 0.3, 0.3])
    s = session
    events = []
    s.subscribe(events.append)
    with pytest.raises(InputError, match="PhaseIdentification"):
        s.set_phase_id("Au")
    s.set_phase_id(pid)
    assert s.phase_id is pid and "phase_id" in events[-1] and s.undo_label == "Identify phases"
    assert s.to_analysis().phase_id is pid
    assert s.to_analysis().to_dict()["phase_identification"]["candidates"][0]["phases"] == ["Au"]
    s.undo()
    assert s.phase_id is None and "phase_id" in events[-1]
    s.redo()
    t = Session.load(s.save(tmp_path / "p.saedkit.json"))
    assert type(t.phase_id) is PhaseIdentification and t.phase_id.best.phases == ("Au",)
    assert json.dumps(t.phase_id.to_dict()) == json.dumps(pid.to_dict())
    assert t.phase_id.candidates[0].matches[0].hkl == (1, 1, 1) and type(t.phase_id.candidates[0].matches) is tuple
    # a session file written before phase identification existed loads with none
    rec = json.loads((tmp_path / "p.saedkit.json").read_text())
    del rec["phase_id"]
    (tmp_path / "old.saedkit.json").write_text(json.dumps(rec))
    assert Session.load(tmp_path / "old.saedkit.json").phase_id is None

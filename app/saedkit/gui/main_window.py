"""The main window: the pattern view, the step panels, menus, tools, long work and autosave.

The window holds one :class:`~saedkit.core.workflow.session.Session` and redraws from
its change notices. Every edit goes through the session (so it can be undone);
every computation is a core function, run on the task runner when it can take
long. Expected failures (:class:`~saedkit.core.errors.SaedkitError`) are shown
in the notice bar above the pattern; the program never stops on them.
"""

from __future__ import annotations

import dataclasses
import math
import os
import sys
import traceback
from pathlib import Path
from typing import Any, Callable

import numpy as np
from PySide6.QtCore import QByteArray, QPointF, Qt, QTimer
from PySide6.QtGui import QAction, QActionGroup, QKeySequence
from PySide6.QtWidgets import (
    QCheckBox,
    QComboBox,
    QDialog,
    QDockWidget,
    QDoubleSpinBox,
    QFileDialog,
    QLabel,
    QMainWindow,
    QMessageBox,
    QProgressBar,
    QScrollArea,
    QTabWidget,
    QToolBar,
    QToolButton,
    QVBoxLayout,
    QWidget,
)

from saedkit.core.errors import InputError, SaedkitError
from saedkit.core.workflow.session import (
    SESSION_SUFFIX,
    Session,
    autosave_path,
    find_leftover_autosave,
    remove_autosave,
)
from saedkit.gui import settings as app_prefs
from saedkit.gui.dialogs import NewPhaseDialog, NoticeBar, PreferencesDialog, SaveCalibrationDialog, show_details
from saedkit.gui.display import DisplaySettings, calculate_colour_table, calculate_display_image
from saedkit.gui.icons import icon
from saedkit.gui.panels import fmt_pm, fmt_sigma
from saedkit.gui.panels import CalibrationPanel, DisplayPanel, MeasurementsPanel, PhasesPanel, RingPhasesPanel, SearchPanel
from saedkit.gui.tools import TOOL_CLASSES, describe_pair
from saedkit.gui.view import LAYER_NAMES, PatternView, calculate_argb_image
from saedkit.gui.legend import MarkerLegend
from saedkit.gui.magnifier import Magnifier
from saedkit.gui.plot import CurvePlot
from saedkit.gui.widgets import guard_wheel
from saedkit.gui.workers import TaskRunner

__all__ = ["MainWindow", "IMAGE_FILTER", "SESSION_FILTER"]

IMAGE_FILTER = ("Diffraction patterns (*.tif *.tiff *.png *.jpg *.jpeg *.mrc *.mrcs *.npy);;"
                "saedkit sessions (*.saedkit.json);;All files (*)")
SESSION_FILTER = "saedkit sessions (*.saedkit.json);;All files (*)"
_AUTOSAVE_MS = 30_000
_PREVIEW_SIDE = 1024
_LAYOUT_VERSION = 2  # the dock layout's version: a layout saved by an older arrangement is not restored


def _render_screen(data: np.ndarray, settings: DisplaySettings, *, mask=None, step: int = 1) -> tuple:
    """(8-bit image, limits, 32-bit screen pixels, step) of a pattern: numpy only, safe in a worker."""
    image8, limits = calculate_display_image(data, settings, mask=mask, step=step)
    argb = calculate_argb_image(image8, calculate_colour_table(settings.colour_map, invert=settings.invert))
    return image8, limits, argb, step


def _shown_hkl(hkl, candidate) -> tuple:
    """(hkl) as shown: Miller–Bravais (hkil) for a hexagonal candidate."""
    if candidate is not None and candidate.zone_four_index is not None:
        from saedkit.core.crystallography.crystal import to_four_index_plane

        return to_four_index_plane(hkl)
    return tuple(int(v) for v in hkl)


def _redo_keys() -> list[QKeySequence]:
    """Ctrl+Shift+Z and Ctrl+Y (and the platform's Redo), each once: a key bound twice is 'ambiguous'."""
    keys: list[QKeySequence] = []
    seen: set[str] = set()
    for k in [*QKeySequence.keyBindings(QKeySequence.StandardKey.Redo), QKeySequence("Ctrl+Shift+Z"),
              QKeySequence("Ctrl+Y")]:
        text = k.toString(QKeySequence.SequenceFormat.PortableText)
        if text and text not in seen:
            seen.add(text)
            keys.append(k)
    return keys


def _phases_to_search(session: Session) -> list[str]:
    """The ticked phases; with none ticked, the whole built-in library (the same for spots and rings)."""
    names = list(session.phases)
    if not names:
        from saedkit.core.crystallography.library import LIBRARY

        names = [e.name for e in LIBRARY]
    return names


def _count_frames(path) -> int:
    """How many frames (pages) a TIFF file holds; 1 for other files or when it cannot tell."""
    p = Path(path)
    if p.suffix.lower() not in (".tif", ".tiff"):
        return 1
    try:
        import tifffile

        with tifffile.TiffFile(p) as tf:
            series = tf.series[0] if tf.series else None
            if series is not None and len(series.shape) >= 3 and "Y" in series.axes and series.axes[-1] != "S":
                return int(np.prod(series.shape[:-2]))
            return max(len(tf.pages), 1)
    except Exception:  # noqa: BLE001 - counting frames is a courtesy; the reader reports real faults
        return 1


def _detector_mask_folder() -> Path:
    from saedkit.core.workflow.session import data_dir

    return data_dir() / "detector_masks"


def _warm_up_imports() -> None:
    """Import the computing modules in a background thread, so the first click or search does not wait."""
    import importlib
    import threading

    def load():
        for name in ("saedkit.core.detection.spots", "saedkit.core.detection.masks", "saedkit.core.detection.rings", "saedkit.core.detection.centre",
                     "saedkit.core.indexing.matching", "saedkit.core.calibration.calibrate", "saedkit.core.calibration.library"):
            try:
                importlib.import_module(name)
            except ImportError:
                pass

    threading.Thread(target=load, name="saedkit-warm-up", daemon=True).start()


def _needs(module: str, name: str):
    """Import ``name`` from a saedkit module, or raise a SaedkitError saying it is not available."""
    import importlib

    try:
        mod = importlib.import_module(module)
        return getattr(mod, name)
    except (ImportError, AttributeError):
        raise SaedkitError(f"{name} is not available in this installation of saedkit ({module})") from None


class MainWindow(QMainWindow):
    """The saedkit desktop window.

    Parameters
    ----------
    synchronous : bool
        Run long tasks at once in the GUI thread (tests).
    autosave_ms : int
        Autosave period while there are unsaved changes (≤ 60 s).
    """

    def __init__(self, *, synchronous: bool = False, autosave_ms: int = _AUTOSAVE_MS) -> None:
        super().__init__()
        self.setWindowIcon(icon("saedkit"))
        self.setAcceptDrops(True)
        self.session: Session | None = None
        self._unsubscribe: Callable[[], None] | None = None
        self.runner = TaskRunner(self, synchronous=synchronous)
        self.prefs = app_prefs.read_preferences()
        self.display = app_prefs.read_display()
        self.notices: list[tuple[str, str]] = []  # (level, text), newest last
        self.selected_spot: int | None = None
        self.ruler_result = None
        self._display_limits: tuple[float, float] | None = None
        self._display_done_key: tuple | None = None
        self._autosaved_revision = -1
        self._pending_after_open: Callable[[Session], None] | None = None

        self.view = PatternView()
        self.setCentralWidget(self.view)
        # the notice bar floats over the top of the view, so a message never moves the image
        self.notice = NoticeBar(self.view)
        self.notice.attach_to(self.view)
        self.magnifier = Magnifier(self.view.viewport())
        self.legend = MarkerLegend(self.view.viewport())
        self.view.viewport().installEventFilter(self)
        self.tools = {cls.name: cls(self) for cls in TOOL_CLASSES}
        self.tool = None

        self._build_actions()
        self._build_docks()
        self._build_menus()
        self._build_toolbars()
        self._build_status()
        self.view.cursor_moved.connect(self._cursor_moved)
        self.view.cursor_left.connect(self._cursor_left)
        self.view.files_dropped.connect(lambda paths: self.guard(lambda: self.open_path(paths[0])))
        self.runner.busy_changed.connect(self._busy_changed)
        self.runner.task_started.connect(lambda key, label: self._task_label.setText(label + "…"))
        self.runner.task_progress.connect(self._task_progress)
        self.set_tool("pan")
        self._autosave_timer = QTimer(self)
        self._autosave_timer.setInterval(min(int(autosave_ms), 60_000))
        self._autosave_timer.timeout.connect(self.autosave)
        self._autosave_timer.start()
        self.resize(1400, 900)
        self._restore_window_state()
        self._refresh_all()
        if not synchronous:
            _warm_up_imports()

    # ================================================================== building

    def _act(self, text: str, slot, *, icon_name: str | None = None, shortcut=None, tip: str = "",
             checkable: bool = False) -> QAction:
        a = QAction(text, self)
        if icon_name:
            a.setIcon(icon(icon_name))
        if shortcut is not None:
            if isinstance(shortcut, (list, tuple)):
                a.setShortcuts([QKeySequence(s) for s in shortcut])
            else:
                a.setShortcut(QKeySequence(shortcut))
        a.setCheckable(checkable)
        keys = a.shortcut().toString(QKeySequence.SequenceFormat.NativeText)
        tip = tip or text.replace("&", "").rstrip("…")
        a.setStatusTip(tip)
        a.setToolTip(f"{tip} ({keys})" if keys else tip)
        if checkable:
            a.toggled.connect(slot)
        else:
            a.triggered.connect(lambda _=False: self.guard(slot))
        self.addAction(a)
        return a

    def _build_actions(self) -> None:
        SK = QKeySequence.StandardKey
        self.act_open = self._act("&Open pattern…", self.open_dialog, icon_name="open", shortcut=SK.Open,
                                  tip="Open a diffraction pattern (TIFF, MRC, PNG, JPEG, NPY) or a saved session")
        self.act_open_session = self._act("Open &session…", self.open_session_dialog, shortcut="Ctrl+Shift+O")
        self.act_save = self._act("&Save session", self.save_session, icon_name="save", shortcut=SK.Save,
                                  tip="Save the whole session (centre, spots, mask, calibration, results) as one file")
        self.act_save_as = self._act("Save session &as…", self.save_session_as, shortcut=SK.SaveAs)
        self.act_export = self._act("&Export report…", self.export_report, icon_name="export",
                                    shortcut="Ctrl+E", tip="Write the table (CSV), record (JSON), annotated pattern "
                                    "(PNG, SVG) and a PDF report")
        self.act_quit = self._act("&Quit", self.close, shortcut=SK.Quit)
        self.act_undo = self._act("&Undo", self.undo, icon_name="undo", shortcut=SK.Undo)
        self.act_redo = self._act("&Redo", self.redo, icon_name="redo", shortcut=_redo_keys())
        prefs_keys = QKeySequence.keyBindings(SK.Preferences) or [QKeySequence("Ctrl+,")]
        self.act_prefs = self._act("&Preferences…", self.preferences, shortcut=list(prefs_keys))
        self.act_fit = self._act("&Fit to window", self.view.fit, icon_name="fit", shortcut="Ctrl+0")
        self.act_actual = self._act("&Actual pixels (1:1)", self.view.actual_size, icon_name="actual-size",
                                    shortcut="Ctrl+1")
        self.act_zoom_in = self._act("Zoom &in", lambda: self.view.zoom_by(1.25), shortcut=SK.ZoomIn)
        self.act_zoom_out = self._act("Zoom &out", lambda: self.view.zoom_by(0.8), shortcut=SK.ZoomOut)
        self.act_find_spots = self._act("&Find spots", self.find_spots, icon_name="find-spots", shortcut="F5",
                                        tip="Find and refine the spots automatically")
        self.act_search = self._act("&Search zone axes", self.search, icon_name="search", shortcut="F6",
                                    tip="Rank the zone axes of the ticked phases (or the whole library when none is "
                                    "ticked) that explain the spots")
        self.act_calibrate = self._act("&Calibrate from rings", self.calibrate, icon_name="calibrate", shortcut="F7",
                                       tip="Fit the rings of a standard and find the camera constant")
        self.act_identify = self._act("&Identify phases from rings", self.identify_phases, shortcut="F8",
                                      tip="Rank the ticked phases (or the whole library) that explain the rings "
                                      "of a polycrystalline film; needs a camera constant")
        self.act_centre_rings = self._act("Centre from &rings", self.centre_from_rings, shortcut="Shift+F4",
                                          tip="Fit the rings and take their common centre")
        self.act_centre_friedel = self._act("Centre from Friedel &pairs", self.centre_from_friedel, shortcut="F4",
                                            tip="Find the centre from spots and their Friedel partners (g, −g)")
        self.act_auto_mask = self._act("Automatic &mask", self.auto_mask, shortcut="F3",
                                       tip="Mask the saturated pixels and the beam stop")
        self.act_clear_mask = self._act("&Clear mask", self.clear_mask, shortcut="Shift+F3")
        self.act_save_detector_mask = self._act("Save mask as &detector mask…", self.save_detector_mask,
                                                shortcut="Ctrl+Shift+M",
                                                tip="Keep the mask as the camera's own: it is applied to every "
                                                "pattern of this size opened later")
        self.act_cancel = self._act("Cancel running work", lambda: self.runner.cancel(), shortcut="Ctrl+.")
        self.tool_group = QActionGroup(self)
        self.tool_actions: dict[str, QAction] = {}
        icons = {"pan": "pan", "centre": "centre", "spot": "spot", "ruler": "measure", "mask": "mask",
                 "profile": "measure"}
        for n, cls in enumerate(TOOL_CLASSES, start=2):
            a = QAction(icon(icons[cls.name]), cls.title, self)
            a.setCheckable(True)
            a.setShortcut(QKeySequence(f"Ctrl+{n}"))
            a.setToolTip(f"{cls.title} tool (Ctrl+{n}) — {cls.hint}")
            a.setStatusTip(cls.hint)
            a.triggered.connect(lambda _=False, name=cls.name: self.set_tool(name))
            self.tool_group.addAction(a)
            self.tool_actions[cls.name] = a
            self.addAction(a)
        self.act_fitted_grid = self._act("Candidate grid with its &fitted K", lambda on: self.refresh_overlays(),
                                         checkable=True, tip="Draw the chosen candidate's grid with the camera "
                                         "constant its fit found, not the calibration's (calibrated patterns)")
        self.act_legend = self._act("Marker &legend", lambda on: self._refresh_legend(), shortcut="Ctrl+L",
                                    checkable=True, tip="Show the key of the marks in the corner of the pattern")
        self.act_legend.setChecked(True)
        self.act_magnifier = self._act("&Magnifier", lambda on: None if on else self.magnifier.hide(),
                                       shortcut="Ctrl+M", checkable=True,
                                       tip="Show the pixels around the cursor enlarged beside it (Ctrl+M)")
        self.act_pattern_only = self._act("&Pattern only", self.toggle_pattern_only, shortcut="F11", checkable=True,
                                          tip="Hide the panels and the tool options to give the whole window to the "
                                          "pattern (F11 again brings them back)")
        self.act_table = self._act("Measurement &table", self.show_table, shortcut="Ctrl+T", checkable=True,
                                   tip="Show or hide the measurement table (Ctrl+T)")
        self.act_next_candidate = self._act("&Next candidate", lambda: self.step_candidate(+1), shortcut="]",
                                            tip="Show the next zone-axis candidate's grid (])")
        self.act_prev_candidate = self._act("&Previous candidate", lambda: self.step_candidate(-1), shortcut="[",
                                            tip="Show the previous zone-axis candidate's grid ([)")
        self.layer_actions: dict[str, QAction] = {}
        for name, text in LAYER_NAMES.items():
            a = QAction(text, self)
            a.setCheckable(True)
            a.setChecked(self.view.visible.get(name, True))
            a.toggled.connect(lambda on, n=name: self.set_layer_visible(n, on))
            self.layer_actions[name] = a

    def _build_menus(self) -> None:
        mb = self.menuBar()
        m = mb.addMenu("&File")
        m.addAction(self.act_open)
        self.recent_menu = m.addMenu("Open &recent")
        self.recent_menu.aboutToShow.connect(self._fill_recent_menu)
        m.addAction(self.act_open_session)
        m.addSeparator()
        m.addAction(self.act_save)
        m.addAction(self.act_save_as)
        m.addAction(self.act_export)
        m.addSeparator()
        m.addAction(self.act_quit)
        m = mb.addMenu("&Edit")
        m.addAction(self.act_undo)
        m.addAction(self.act_redo)
        m.addSeparator()
        m.addAction(self.act_prefs)
        m = mb.addMenu("&View")
        for a in (self.act_fit, self.act_actual, self.act_zoom_in, self.act_zoom_out):
            m.addAction(a)
        m.addSeparator()
        ov = m.addMenu("&Overlays")
        for a in self.layer_actions.values():
            ov.addAction(a)
        ov.addSeparator()
        ov.addAction(self.act_fitted_grid)
        m.addSeparator()
        m.addAction(self.act_magnifier)
        m.addAction(self.act_legend)
        m.addAction(self.act_table)
        m.addAction(self.act_pattern_only)
        panels = m.addMenu("&Panels")
        for d in self.docks.values():
            panels.addAction(d.toggleViewAction())
        self.docks["measurements"].visibilityChanged.connect(lambda _v: self._sync_table_action())
        m = mb.addMenu("&Tools")
        for a in self.tool_actions.values():
            m.addAction(a)
        m = mb.addMenu("&Analyse")
        for a in (self.act_auto_mask, self.act_clear_mask, self.act_save_detector_mask, None, self.act_centre_rings, self.act_centre_friedel,
                  None, self.act_calibrate, self.act_find_spots, self.act_search, self.act_next_candidate,
                  self.act_prev_candidate, self.act_identify, None,
                  self.act_cancel):
            m.addSeparator() if a is None else m.addAction(a)
        m = mb.addMenu("&Help")
        self._act_demo_session = m.addAction("Open the &demo session")
        self._act_demo_session.triggered.connect(lambda: self.guard(lambda: self.open_demo("session")))
        demo = m.addMenu("Demo &patterns")
        for key, text in (("film", "Gold film (calibration standard)"), ("grain_a", "Grain A (unknown)"),
                          ("grain_b", "Grain B (unknown)")):
            a = demo.addAction(text)
            a.triggered.connect(lambda _=False, k=key: self.guard(lambda: self.open_demo(k)))
        m.addSeparator()
        a = m.addAction("&Mouse and keys")
        a.triggered.connect(self._show_help)
        self.act_shortcuts = self._act("&Keyboard shortcuts", self.show_shortcuts, shortcut="F1",
                                       tip="Every key of the program on one sheet")
        m.addAction(self.act_shortcuts)
        a = m.addAction("&About saedkit")
        a.triggered.connect(self._about)

    def _build_toolbars(self) -> None:
        tb = QToolBar("Main")
        tb.setObjectName("mainToolbar")
        tb.setToolButtonStyle(Qt.ToolButtonStyle.ToolButtonIconOnly)
        for a in (self.act_open, self.act_save, None, self.act_undo, self.act_redo, None):
            tb.addSeparator() if a is None else tb.addAction(a)
        for a in self.tool_actions.values():
            tb.addAction(a)
        tb.addSeparator()
        tb.addAction(self.act_fit)
        tb.addAction(self.act_actual)
        tb.addSeparator()
        for a in (self.act_calibrate, self.act_find_spots, self.act_search, self.act_export):
            tb.addAction(a)
        self.addToolBar(tb)
        # options of the current tool
        ob = QToolBar("Tool options")
        ob.setObjectName("toolOptions")
        self.tool_options = ob
        self.opt_hint = QLabel("")
        self.opt_hint.setStyleSheet("color: #7d8a97; padding-left: 6px;")
        self.opt_friedel = QCheckBox("across the centre (g, −g)")
        self.opt_friedel.toggled.connect(lambda on: self.tools["ruler"].set_friedel(on))
        self.opt_mask_mode = QComboBox()
        self.opt_mask_mode.addItems(["brush", "polygon"])
        self.opt_mask_mode.currentTextChanged.connect(lambda t: self.tools["mask"].set_mode(t))
        self.opt_brush = QDoubleSpinBox()
        self.opt_brush.setRange(1.0, 500.0)
        self.opt_brush.setValue(self.tools["mask"].radius_px)
        self.opt_brush.setSuffix(" px")
        self.opt_brush.setPrefix("radius ")
        self.opt_brush.valueChanged.connect(lambda v: setattr(self.tools["mask"], "radius_px", v))
        self.opt_erase = QCheckBox("erase (include again)")
        self.opt_erase.toggled.connect(lambda on: setattr(self.tools["mask"], "erase", on))
        self._opt_actions = {
            "ruler": [ob.addWidget(self.opt_friedel)],
            "mask": [ob.addWidget(self.opt_mask_mode), ob.addWidget(self.opt_brush), ob.addWidget(self.opt_erase)],
        }
        ob.addWidget(self.opt_hint)
        self.addToolBarBreak()
        self.addToolBar(ob)

    def _dock(self, key: str, title: str, widget: QWidget, area, scroll: bool = True) -> QDockWidget:
        d = QDockWidget(title, self)
        d.setObjectName(f"dock_{key}")
        if scroll:
            sa = QScrollArea()
            sa.setWidgetResizable(True)
            sa.setHorizontalScrollBarPolicy(Qt.ScrollBarPolicy.ScrollBarAlwaysOff)
            sa.setFrameShape(QScrollArea.Shape.NoFrame)
            sa.setWidget(widget)
            d.setWidget(sa)
        else:
            d.setWidget(widget)
        self.addDockWidget(area, d)
        self.docks[key] = d
        return d

    def _build_docks(self) -> None:
        self.docks: dict[str, QDockWidget] = {}
        self.display_panel = DisplayPanel(self, self.display)
        self.calibration_panel = CalibrationPanel(self)
        self.phases_panel = PhasesPanel(self)
        self.search_panel = SearchPanel(self)
        self.measurements_panel = MeasurementsPanel(self)
        self.ring_phases_panel = RingPhasesPanel(self)
        # the steps are tabs of one column on the right, the table is shown on demand: the pattern gets the room
        right = Qt.DockWidgetArea.RightDockWidgetArea
        self.setDockOptions(QMainWindow.DockOption.AnimatedDocks | QMainWindow.DockOption.AllowTabbedDocks
                            | QMainWindow.DockOption.AllowNestedDocks)
        self.setTabPosition(Qt.DockWidgetArea.AllDockWidgetAreas, QTabWidget.TabPosition.North)
        self._dock("calibration", "Camera constant", self.calibration_panel, right)
        for key, title, panel in (("search", "Zone-axis search", self.search_panel),
                                  ("phases", "Phases", self.phases_panel),
                                  ("ring_phases", "Phases from rings", self.ring_phases_panel),
                                  ("display", "Display", self.display_panel)):
            self._dock(key, title, panel, right)
            self.tabifyDockWidget(self.docks["calibration"], self.docks[key])
        self.docks["calibration"].raise_()
        self._dock("measurements", "Measurements", self.measurements_panel, Qt.DockWidgetArea.BottomDockWidgetArea,
                   scroll=False)
        self.profile_plot = CurvePlot()
        self._dock("profile", "Profile", self.profile_plot, Qt.DockWidgetArea.BottomDockWidgetArea, scroll=False)
        self.tabifyDockWidget(self.docks["measurements"], self.docks["profile"])
        self.docks["profile"].hide()
        self.docks["measurements"].hide()
        self._table_hidden_by_user = False
        self.docks["measurements"].toggleViewAction().triggered.connect(
            lambda on: setattr(self, "_table_hidden_by_user", not on))
        guard_wheel(self)
        self.display_panel.display_changed.connect(self._display_changed)
        self.display_panel.layer_toggled.connect(self.set_layer_visible)
        self.measurements_panel.spot_selected.connect(self._table_selected_spot)
        self.ring_phases_panel.chosen_changed.connect(lambda _row: self.refresh_overlays())

    def _build_status(self) -> None:
        sb = self.statusBar()
        self.readout = QLabel("")
        self.readout.setMinimumWidth(560)
        self.readout.setStyleSheet("font-family: monospace;")
        self._task_label = QLabel("")
        self.progress = QProgressBar()
        self.progress.setMaximumWidth(180)
        self.progress.setTextVisible(False)
        self.cancel_button = QToolButton()
        self.cancel_button.setText("Cancel")
        self.cancel_button.clicked.connect(lambda: self.runner.cancel())
        for w in (self._task_label, self.progress, self.cancel_button):
            w.hide()
        sb.addPermanentWidget(self._task_label)
        sb.addPermanentWidget(self.progress)
        sb.addPermanentWidget(self.cancel_button)
        sb.addPermanentWidget(self.readout)

    # ================================================================== messages

    def notify(self, text: str, level: str = "info", *, actions=(), details: str | None = None) -> None:
        """Show a message in the window (never blocks)."""
        self.notices.append((level, text))
        del self.notices[:-50]
        acts = list(actions)
        if details:
            acts.append(("Details…", lambda: show_details(self, "saedkit", text, details)))
        timeout = 8000 if level in ("info", "success") and not acts else 0
        self.notice.show_notice(text, level, actions=acts, timeout_ms=timeout)
        self.statusBar().showMessage(text.split("\n")[0], 10000)

    def show_status(self, text: str) -> None:
        self.statusBar().showMessage(text, 8000)

    def guard(self, fn: Callable[[], Any]) -> Any:
        """Call ``fn``; show an expected failure (SaedkitError) as a message instead of raising."""
        try:
            return fn()
        except SaedkitError as exc:
            self.notify(str(exc), "error")
        except MemoryError:
            self.notify("Not enough memory for this operation.", "error")
        return None

    def report_exception(self, exc: BaseException, tb: str | None = None) -> None:
        """Show an error from a task or an unexpected exception."""
        if isinstance(exc, SaedkitError):
            self.notify(str(exc), "error")
            return
        details = tb or "".join(traceback.format_exception(type(exc), exc, exc.__traceback__))
        print(details, file=sys.stderr)
        self.notify(f"Unexpected error: {type(exc).__name__}: {exc}. The program keeps running; "
                    "please report this with the details.", "error", details=details)

    def _task_error(self, exc: BaseException) -> None:
        self.report_exception(exc, getattr(exc, "__saedkit_traceback__", None))

    def _submit(self, key: str, label: str, fn, on_done) -> int:
        return self.runner.submit(key, label, fn, on_done=lambda r: self.guard(lambda: on_done(r)),
                                  on_error=self._task_error)

    def _busy_changed(self, busy: bool) -> None:
        for w in (self._task_label, self.progress, self.cancel_button):
            w.setVisible(busy)
        self.progress.setRange(0, 0)
        if not busy:
            self._task_label.setText("")

    def _task_progress(self, label: str, done: int, total: int) -> None:
        if total > 0:
            self.progress.setRange(0, total)
            self.progress.setValue(done)
        self._task_label.setText(f"{label}… {done}/{total}" if total else f"{label}…")

    # ================================================================== session wiring

    def set_session(self, session: Session | None) -> None:
        """Show ``session`` (or nothing)."""
        if self._unsubscribe is not None:
            self._unsubscribe()
            self._unsubscribe = None
        if self.session is not None and session is not self.session:
            # the replaced session was saved or discarded: its autosave must not be offered after a crash
            remove_autosave()
        self.session = session
        self.selected_spot = None
        self._autosaved_revision = -1
        self.notice.dismiss()  # messages about the previous file
        self.tools["ruler"].clear()
        self.measurements_panel.show_ruler(None)
        if session is not None:
            self._unsubscribe = session.subscribe(self._on_session_event)
        self._refresh_all()

    def _on_session_event(self, event) -> None:
        changed = event.changed
        if "mask" in changed:
            self._refresh_mask()
        if changed - {"saved", "mask"} or "mask" in changed:
            self.refresh_overlays()
        if changed & {"spots", "centre", "calibration", "match", "chosen_candidate"}:
            self.measurements_panel.refresh()
        if changed & {"spots", "match", "chosen_candidate", "settings"}:
            self.search_panel.refresh()
        if changed & {"calibration", "ring_fit", "settings"}:
            self.calibration_panel.refresh()
        if "phases" in changed:
            self.phases_panel.refresh()
        if changed & {"phase_id", "ring_fit", "calibration", "phases"}:
            self.ring_phases_panel.refresh()
        if event.kind in ("undo", "redo"):
            self.show_status(f"{event.kind.capitalize()}: {event.label}")
        self._update_title_and_actions()

    def _refresh_all(self) -> None:
        self._refresh_mask()
        self.refresh_overlays()
        for p in (self.calibration_panel, self.phases_panel, self.search_panel, self.ring_phases_panel,
                  self.measurements_panel):
            p.refresh()
        self._update_title_and_actions()

    def _update_title_and_actions(self) -> None:
        s = self.session
        has = s is not None
        name = "no pattern"
        if has:
            src = s.image.source_path
            name = Path(s.path).name if s.path else (Path(src).name if src else "unsaved pattern")
        self.setWindowTitle(f"saedkit — {name}[*]")
        self.setWindowModified(bool(has and s.is_modified))
        self.act_undo.setEnabled(bool(has and s.can_undo))
        self.act_redo.setEnabled(bool(has and s.can_redo))
        self.act_undo.setText(f"&Undo {s.undo_label}" if has and s.can_undo else "&Undo")
        self.act_redo.setText(f"&Redo {s.redo_label}" if has and s.can_redo else "&Redo")
        for a in (self.act_save, self.act_save_as, self.act_export, self.act_find_spots, self.act_search,
                  self.act_identify, self.act_calibrate, self.act_centre_rings, self.act_centre_friedel, self.act_auto_mask,
                  self.act_clear_mask):
            a.setEnabled(has)

    # ================================================================== overlays

    def _refresh_mask(self) -> None:
        s = self.session
        self.view.mask_layer.set_mask(None if s is None else s.mask)

    def refresh_overlays(self) -> None:
        """Redraw every overlay layer from the session."""
        v = self.view
        s = self.session
        if s is None:
            v.centre_layer.set_centre(None)
            v.spot_layer.set_spots(np.zeros((0, 2)), [])
            v.predicted_layer.set_predicted(np.zeros((0, 2)), [], [], [])
            v.ring_layer.set_rings(None, [], [])
            v.ellipse_layer.set_ellipse(None, 0, 0, 0)
            v.camera_constant_px_A = None
            v.viewport().update()
            return
        c = s.centre
        v.centre_layer.set_centre(None if c is None else (c.x, c.y))
        cand = s.candidate
        labels: list = []
        from saedkit.core.workflow.session import find_spot_hkl

        c_xy = None if c is None else (c.x, c.y)
        hkls = find_spot_hkl(s.spots_xy, cand, centre_xy=c_xy) if cand is not None else [None] * len(s.spots)
        for i, h in enumerate(hkls):
            labels.append(_shown_hkl(h, cand) if h is not None else str(i + 1))
        v.spot_layer.set_spots(s.spots_xy, s.spot_origins, labels)
        v.spot_layer.set_selected(self.selected_spot)
        if cand is not None:
            pred = cand.predicted
            pxy = self.candidate_grid_xy(s, cand)
            taken = np.zeros(len(pxy), bool)
            if len(pxy) and len(s.spots):
                sxy = s.spots_xy
                for i, h in enumerate(hkls):
                    if h is None:
                        continue
                    j = int(np.argmin(np.hypot(*(pxy - sxy[i]).T)))
                    taken[j] = True
            v.predicted_layer.set_predicted(pxy, [_shown_hkl(p.hkl, cand) for p in pred], [p.intensity for p in pred],
                                            [p.forbidden for p in pred], labelled_elsewhere=taken)
        else:
            v.predicted_layer.set_predicted(np.zeros((0, 2)), [], [], [])
        self._refresh_rings()
        k, _, _, source = s.camera_constant
        v.camera_constant_px_A = k if source != "none" and math.isfinite(k) else None
        self._refresh_legend()
        v.viewport().update()

    def candidate_grid_xy(self, s: Session, cand) -> np.ndarray:
        """Where the candidate's reflections are drawn: at R = K/d with the calibration's K on a calibrated
        pattern (so a candidate a few % off in d shows it), at the matcher's fitted places otherwise or when
        View ▸ Candidate grid with its fitted K is on."""
        pred = cand.predicted
        pxy = np.array([(p.x, p.y) for p in pred], float).reshape(-1, 2)
        cal = s.calibration
        if cal is None or not len(pxy) or self.act_fitted_grid.isChecked():
            return pxy
        k_cal = float(cal.camera_constant_px_A)
        lat = s.match.lattice if s.match is not None else None
        if lat is not None and np.all(np.isfinite(lat.centre_xy)):
            c0 = np.asarray(lat.centre_xy, float)
        elif s.centre is not None:
            c0 = np.array([s.centre.x, s.centre.y])
        else:
            return pxy
        ell = getattr(cal, "ellipse", None)
        inv = np.eye(2) if ell is None else np.asarray(ell.inverse_matrix, float)
        fwd = np.linalg.inv(inv)
        ideal = (pxy - c0) @ inv.T  # undistorted offsets
        r = np.hypot(*ideal.T)
        d = np.array([p.d_A for p in pred], float)
        ok = (r > 0) & np.isfinite(d) & (d > 0)
        # camera equation R·d = K (DESIGN.md): the same direction, the radius of the calibration
        scale = np.where(ok, k_cal / np.where(ok, d, 1.0) / np.where(ok, r, 1.0), 1.0)
        return c0 + (ideal * scale[:, None]) @ fwd.T

    def _refresh_legend(self) -> None:
        """The legend lists the kinds of marks on show."""
        s, v = self.session, self.view
        kinds = []
        if s is not None:
            if s.centre is not None and v.visible.get("centre", True):
                kinds.append("centre")
            if v.visible.get("spots", True):
                origins = set(s.spot_origins)
                kinds += [k for k, o in (("spot_auto", "auto"), ("spot_manual", "manual")) if o in origins]
            if v.predicted_layer.count and v.visible.get("predicted", True):
                kinds.append("predicted")
                if np.any(v.predicted_layer.forbidden):
                    kinds.append("forbidden")
            if v.ring_layer.count and v.visible.get("rings", True):
                kinds.append("rings")
            if s.mask.any() and v.visible.get("mask", True):
                kinds.append("mask")
        self.legend.set_kinds(kinds if self.act_legend.isChecked() else [])

    def eventFilter(self, obj, event) -> bool:  # noqa: N802
        if obj is self.view.viewport() and event.type() == event.Type.Resize:
            self.legend.place()
        return False

    def _refresh_rings(self) -> None:
        s = self.session
        v = self.view
        cal = s.calibration
        ring_fit = s.ring_fit
        centre = s.centre
        rings = list(getattr(cal, "rings", None) or ()) if cal is not None else []
        ell = getattr(cal, "ellipse", None) if cal is not None else None
        identified = self._identified_ring_labels()
        if identified is not None:
            e = ring_fit.ellipse
            v.ring_layer.set_rings((ring_fit.centre.x, ring_fit.centre.y), ring_fit.radius_px, identified,
                                   e.ellipticity, e.major_axis_deg)
            v.ellipse_layer.set_ellipse((ring_fit.centre.x, ring_fit.centre.y), 1.08 * float(ring_fit.radius_px.max()),
                                        e.ellipticity, e.major_axis_deg)
        elif rings and getattr(cal, "centre", None) is not None:
            ccentre = cal.centre
            v.ring_layer.set_rings((ccentre.x, ccentre.y), [r.radius_px for r in rings],
                                   [(getattr(r, "hkl", None), getattr(r, "d_A", None)) for r in rings],
                                   ell.ellipticity if ell else 0.0, ell.major_axis_deg if ell else 0.0)
            outer = max(r.radius_px for r in rings)
            v.ellipse_layer.set_ellipse((ccentre.x, ccentre.y), 1.08 * outer,
                                        ell.ellipticity if ell else 0.0, ell.major_axis_deg if ell else 0.0)
        elif ring_fit is not None and ring_fit.rings:
            k, _, _, source = s.camera_constant
            labels = [(None, (k / r.radius_px) if source != "none" else None) for r in ring_fit.rings]
            e = ring_fit.ellipse
            v.ring_layer.set_rings((ring_fit.centre.x, ring_fit.centre.y), ring_fit.radius_px, labels,
                                   e.ellipticity, e.major_axis_deg)
            v.ellipse_layer.set_ellipse((ring_fit.centre.x, ring_fit.centre.y), 1.08 * float(ring_fit.radius_px.max()),
                                        e.ellipticity, e.major_axis_deg)
        else:
            v.ring_layer.set_rings(None, [], [])
            if ell is not None and centre is not None and s.image is not None:
                v.ellipse_layer.set_ellipse((centre.x, centre.y), 0.35 * min(s.image.shape), ell.ellipticity,
                                            ell.major_axis_deg)
            else:
                v.ellipse_layer.set_ellipse(None, 0, 0, 0)

    def _identified_ring_labels(self) -> list | None:
        """(hkl, d) of each fitted ring under the chosen phase-identification row; None when there is none.

        Only when the identification was made on the session's ring fit (one
        spacing per ring).
        """
        s = self.session
        pid, ring_fit = s.phase_id, s.ring_fit
        if pid is None or not pid.candidates or ring_fit is None or len(ring_fit.rings) != len(pid.d_A):
            return None
        c = pid.candidates[min(self.ring_phases_panel.chosen_row(), len(pid.candidates) - 1)]
        return [(None if m.hkl is None else tuple(int(x) for x in m.hkl), m.d_A) for m in c.matches]

    def set_layer_visible(self, name: str, on: bool) -> None:
        self.view.set_layer_visible(name, on)
        self._refresh_legend()
        a = self.layer_actions.get(name)
        if a is not None and a.isChecked() != on:
            a.setChecked(on)
        self.display_panel.set_layer_checked(name, on)

    def select_spot(self, index: int | None) -> None:
        self.selected_spot = index
        self.view.spot_layer.set_selected(index)
        self.measurements_panel.select_spot(index)

    def _table_selected_spot(self, index) -> None:
        self.selected_spot = index
        self.view.spot_layer.set_selected(index)
        if index is not None and self.session is not None and index < len(self.session.spots):
            sp = self.session.spots[index]
            self.view.centerOn(sp.x, sp.y) if self.view.scale_factor() > 1.5 else None

    def show_ruler(self, m) -> None:
        self.ruler_result = m
        if m is None:
            self.measurements_panel.show_ruler(None)
            return
        lines = describe_pair(m)
        self.measurements_panel.show_ruler(lines)
        self.show_status("Ruler: " + " · ".join(lines))

    # ================================================================== display

    def _show_image(self, screen: tuple) -> None:
        """Show a screen image made by :func:`_render_screen`."""
        image8, limits, argb, step = screen
        s = self.session
        shape = None if s is None else s.image.shape
        self.view.set_image8(image8, calculate_colour_table(self.display.colour_map, invert=self.display.invert),
                             step=step, shape=shape, argb=argb)
        self._display_limits = limits
        self.display_panel.show_limits(*limits)

    def _display_changed(self, new: DisplaySettings, preview: bool) -> None:
        old = self.display
        self.display = new
        app_prefs.write_display(new)
        s = self.session
        if s is None:
            return
        if new.curve_key() == old.curve_key() and not preview and self._display_done_key == new.curve_key():
            self._recolour(new)
            return
        self.update_display(preview=preview)

    def _recolour(self, settings: DisplaySettings) -> None:
        """Apply another colour table to the shown 8-bit image (in the worker for big images)."""
        image8 = self.view.image8
        if image8 is None:
            return
        table = calculate_colour_table(settings.colour_map, invert=settings.invert)
        if image8.size < 1_500_000:
            self.view.set_colour_table(table)
            return

        def work(progress, should_stop):
            return calculate_argb_image(image8, table)

        def done(argb):
            if self.view.image8 is image8:
                self.view.set_colour_table(table, argb=argb)

        self._submit("display", "Updating the display", work, done)

    def update_display(self, *, preview: bool = False) -> None:
        """Recompute the screen image from the pattern (a quick subsampled preview while dragging)."""
        s = self.session
        if s is None:
            return
        data = s.image.data
        settings = self.display
        if preview:
            step = max(1, int(math.ceil(max(data.shape) / _PREVIEW_SIDE)))
            self._show_image(_render_screen(data, settings, step=step))
            self._display_done_key = None
            return
        mask = s.mask

        def work(progress, should_stop):
            return _render_screen(data, settings, mask=mask)

        def done(result):
            if self.session is not s:
                return
            self._show_image(result)
            self._display_done_key = settings.curve_key()

        self._submit("display", "Updating the display", work, done)

    # ================================================================== opening

    def _confirm_discard(self) -> bool:
        """True when the current session may be replaced (saved, discarded, or unchanged)."""
        s = self.session
        if s is None or not s.is_modified:
            return True
        ans = QMessageBox.question(
            self, "Unsaved changes", "The current session has changes that are not saved. Save them first?",
            QMessageBox.StandardButton.Save | QMessageBox.StandardButton.Discard | QMessageBox.StandardButton.Cancel,
            QMessageBox.StandardButton.Save)
        if ans == QMessageBox.StandardButton.Cancel:
            return False
        if ans == QMessageBox.StandardButton.Save:
            return bool(self.guard(self.save_session))
        return True

    def open_dialog(self) -> None:
        start = str(Path(app_prefs.recent_files()[0]).parent) if app_prefs.recent_files() else ""
        path, _ = QFileDialog.getOpenFileName(self, "Open a diffraction pattern", start, IMAGE_FILTER)
        if path:
            self.open_path(path)

    def open_session_dialog(self) -> None:
        path, _ = QFileDialog.getOpenFileName(self, "Open a saved session", "", SESSION_FILTER)
        if path:
            self.open_path(path)

    def open_path(self, path: str | os.PathLike, *, then: Callable[[Session], None] | None = None,
                  confirm: bool = True) -> None:
        """Open an image file or a session file (by its name)."""
        p = Path(path)
        if confirm and not self._confirm_discard():
            return
        if p.name.endswith(SESSION_SUFFIX) or p.suffix.lower() == ".json":
            self.open_session_file(p)
        else:
            self.open_image_file(p, then=then)

    def open_image_file(self, path: Path, *, then: Callable[[Session], None] | None = None, page: int = 0) -> None:
        from saedkit.core.imageio import read_pattern

        settings = self.display

        def work(progress, should_stop):
            image = read_pattern(path, page=page, mask_nonfinite=True)
            progress(1, 2)
            screen = _render_screen(image.data, settings, mask=image.mask)
            progress(2, 2)
            return image, screen, _count_frames(path)

        def done(result):
            image, screen, n_frames = result
            self._open_image(image, screen, then=then)
            n_bad = 0 if image.mask is None else int(np.count_nonzero(image.mask))
            if n_bad:
                self.notify(f"{Path(path).name}: {n_bad} pixels are NaN or infinite; they are masked (shown in the "
                            "mask colour) and left out of every measurement.", "warning")
            if n_frames > 1:
                self.notify(f"{Path(path).name} holds {n_frames} frames; frame {page + 1} is shown.", "info",
                            actions=[("Choose frame…", lambda: self.choose_frame(path, n_frames, page))])

        def failed(exc):
            self._task_error(exc)
            if isinstance(exc, SaedkitError):
                app_prefs.remove_recent_file(str(Path(path).resolve()))

        self.runner.submit("open", f"Reading {Path(path).name}", work,
                           on_done=lambda r: self.guard(lambda: done(r)), on_error=failed)

    def choose_frame(self, path, n_frames: int, current: int = 0) -> None:
        """Ask which frame (1 … n) of a multi-frame file to show, and open it."""
        from PySide6.QtWidgets import QInputDialog

        frame, ok = QInputDialog.getInt(self, "Choose a frame", f"Frame (1 to {n_frames}):", current + 1, 1,
                                        n_frames)
        if ok and self._confirm_discard():
            self.open_image_file(Path(path), page=frame - 1)

    def open_image(self, image, *, then: Callable[[Session], None] | None = None) -> None:
        """Show a PatternImage already in memory (e.g. from a script)."""
        self._open_image(image, _render_screen(image.data, self.display), then=then)

    def _session_settings_for(self, image):
        """The new pattern's settings: those of the pattern open now (kept from one to the next), else the
        preferences; the image's own voltage and pixel size win."""
        prefs = self.session.settings if self.session is not None else self.prefs
        if getattr(image, "voltage_kv", None):
            prefs = prefs.replace(voltage_kv=image.voltage_kv)
        if getattr(image, "pixel_size_um", None):
            prefs = prefs.replace(pixel_size_um=image.pixel_size_um)
        return prefs

    def _open_image(self, image, screen, *, then=None) -> None:
        previous = self.session
        session = Session(image, settings=self._session_settings_for(image))
        keep_phases = list(previous.phases) if previous is not None else []
        self.set_session(session)
        self._show_image(screen)
        self._display_done_key = self.display.curve_key()
        self.view.fit()
        if image.source_path:
            app_prefs.add_recent_file(image.source_path)
        self.show_status(f"Opened {image.source_path or 'pattern'}: {image.shape[1]}×{image.shape[0]} px, "
                         f"{image.dtype}")
        self._start_auto_mask(session, then=then, keep_phases=keep_phases)

    def _start_auto_mask(self, session: Session, *, then=None, keep_phases=()) -> None:
        from saedkit.core.detection.detector_mask import find_detector_mask

        data = session.image.data
        sat = session.image.saturation_value
        read_mask = session.image.mask

        def work(progress, should_stop):
            from saedkit.core.detection.masks import find_auto_mask

            mask = find_auto_mask(data, saturation_value=sat)
            if read_mask is not None:
                mask = mask | read_mask  # pixels the file itself could not give (NaN, infinite)
            detector = find_detector_mask(_detector_mask_folder(), data.shape)
            if detector is not None:
                mask = mask | detector.mask
            screen_buffer = np.empty(mask.shape, dtype=np.uint32)
            screen_buffer.fill(0)  # paged in here, not on the GUI thread
            return mask, screen_buffer, detector

        def done(result):
            mask, screen_buffer, detector = result
            if self.session is not session:
                return
            self.view.mask_layer.adopt_buffer(screen_buffer)
            session.replace_initial_mask(mask)
            if keep_phases and not session.is_modified and not session.phases:
                # the phases ticked for the previous pattern, as part of the starting state
                session.set_phases(list(keep_phases), label="Keep the phases of the previous pattern")
                session.mark_saved()
            n = int(np.count_nonzero(mask))
            if detector is not None:
                self.show_status(f"Mask: {n} pixels excluded, {detector.n_excluded} of them by the detector mask of "
                                 f"'{detector.camera}'.")
            elif n:
                self.show_status(f"Automatic mask: {n} pixels excluded (saturated or under the beam stop).")
            if then is not None:
                then(session)

        self._submit("mask", "Masking saturated pixels and the beam stop", work, done)

    def open_session_file(self, path: Path, *, image_path: Path | None = None) -> None:
        """Open a saved session (re-reads its image; ``image_path`` when the image has moved)."""
        settings = self.display

        def work(progress, should_stop):
            s = Session.load(path, image_path=image_path)
            return s, _render_screen(s.image.data, settings, mask=s.mask)

        def failed(exc):
            if isinstance(exc, SaedkitError) and "was not found" in str(exc) and image_path is None:
                def locate():
                    found, _ = QFileDialog.getOpenFileName(self, "Where is the session's image?",
                                                           str(Path(path).parent), IMAGE_FILTER)
                    if found:
                        self.open_session_file(path, image_path=Path(found))

                self.notify(str(exc), "error", actions=[("Locate the image…", locate)])
                return
            self._task_error(exc)

        def done(result):
            s, screen = result
            self.set_session(s)
            self._show_image(screen)
            self._display_done_key = settings.curve_key()
            self.view.fit()
            app_prefs.add_recent_file(path)
            for w in s.load_warnings:
                self.notify(w, "warning")
            if not s.load_warnings:
                self.show_status(f"Opened session {path}")

        self.runner.submit("open", f"Reading session {Path(path).name}", work,
                           on_done=lambda r: self.guard(lambda: done(r)), on_error=failed)

    def _fill_recent_menu(self) -> None:
        self.recent_menu.clear()
        files = app_prefs.recent_files()
        if not files:
            a = self.recent_menu.addAction("(none)")
            a.setEnabled(False)
        for f in files:
            a = self.recent_menu.addAction(f)
            a.triggered.connect(lambda _=False, p=f: self.guard(lambda: self.open_path(p)))

    # ================================================================== save, export

    def save_session(self) -> bool:
        s = self.session
        if s is None:
            return False
        if s.path is None:
            return self.save_session_as()
        s.save(s.path)
        remove_autosave()
        self._autosaved_revision = s.revision
        app_prefs.add_recent_file(s.path)
        self.show_status(f"Saved the session to {s.path}")
        self._update_title_and_actions()
        return True

    def save_session_as(self) -> bool:
        s = self.session
        if s is None:
            return False
        src = Path(s.image.source_path) if s.image.source_path else Path.home() / "pattern"
        default = str(src.with_name(src.stem + SESSION_SUFFIX))
        path, _ = QFileDialog.getSaveFileName(self, "Save the session", default, SESSION_FILTER)
        if not path:
            return False
        if not path.endswith(SESSION_SUFFIX):
            path = str(Path(path).with_suffix("")) + SESSION_SUFFIX if path.endswith(".json") else path + SESSION_SUFFIX
        s.path = Path(path)
        return self.save_session()

    def autosave(self) -> bool:
        """Write the autosave file when there are changes since the last one."""
        s = self.session
        if s is None or not s.is_modified or s.revision == self._autosaved_revision or not s.image.source_path:
            return False
        try:
            s.save(autosave_path(), mark_saved=False)
        except (SaedkitError, OSError) as exc:
            self.show_status(f"Autosave failed: {exc}")
            return False
        self._autosaved_revision = s.revision
        return True

    def offer_recovery(self) -> None:
        """If an earlier run left an autosave behind (a crash), offer to recover it."""
        path = find_leftover_autosave()
        if path is None:
            return

        def recover():
            self.guard(lambda: self._recover(path))

        def discard():
            remove_autosave(path)
            self.show_status("Discarded the earlier unsaved session.")

        self.notify("saedkit did not close normally last time. Recover the unsaved session?", "warning",
                    actions=[("Recover", recover), ("Discard", discard)])

    def _recover(self, path: Path) -> None:
        s = Session.load(path)
        s.path = Path(s.recorded_path) if s.recorded_path else None
        s.mark_modified()
        self.set_session(s)
        self._show_image(_render_screen(s.image.data, self.display, mask=s.mask))
        self._display_done_key = self.display.curve_key()
        self.view.fit()
        remove_autosave(path)
        self.autosave()
        self.notify("Recovered the unsaved session. Save it to keep it.", "success")

    def export_report(self) -> None:
        s = self.session
        if s is None:
            return
        try:
            write_report_bundle = _needs("saedkit.report", "write_report_bundle")
        except SaedkitError:
            self.notify("Report export is not available in this installation of saedkit "
                        "(saedkit.report.write_report_bundle is missing).", "warning")
            return
        src = Path(s.image.source_path) if s.image.source_path else Path.home() / "pattern"
        default = str(src.parent / f"{src.stem}_report")
        chosen, _ = QFileDialog.getSaveFileName(self, "Export the report into a folder (made when missing)",
                                                default, "Report folder (*)")
        if not chosen:
            return
        out = Path(chosen)
        if out.exists() and not out.is_dir():
            raise InputError(f"{out}: exists and is not a folder; choose a folder name for the report")
        out.mkdir(parents=True, exist_ok=True)
        analysis = s.to_analysis()
        # the report draws the pattern with the display the user sees (curve, limits, colours)
        analysis = dataclasses.replace(analysis, parameters={**dict(analysis.parameters or {}),
                                                             "display": self.display.to_dict()})

        def work(progress, should_stop):
            return write_report_bundle(analysis, out, progress=progress)

        def done(paths):
            names = ", ".join(f"{k}: {Path(v).name}" for k, v in dict(paths).items())
            self.notify(f"Report written to {out} ({names}).", "success")

        self._submit("export", "Writing the report", work, done)

    # ================================================================== edits

    def undo(self) -> None:
        if self.session is not None and not self.session.undo():
            self.show_status("Nothing to undo.")

    def redo(self) -> None:
        if self.session is not None and not self.session.redo():
            self.show_status("Nothing to redo.")

    def show_line_profile(self, a_xy, b_xy) -> None:
        """The intensity along the line from ``a_xy`` to ``b_xy`` (spots on it marked), in the Profile panel."""
        from saedkit.core.detection.profiles import calculate_line_profile

        s = self._require()
        prof = calculate_line_profile(s.image.data, a_xy, b_xy, mask=s.mask,
                                      spots_xy=s.spots_xy if s.spots else None)
        self.line_profile = prof
        self.profile_plot.set_curve(prof.distance_px, prof.intensity, x_name="distance (px)",
                                    title=f"line ({a_xy[0]:.0f}, {a_xy[1]:.0f}) → ({b_xy[0]:.0f}, {b_xy[1]:.0f}), "
                                          f"{prof.length_px:.1f} px",
                                    marks=[(d, str(i + 1)) for d, i in zip(prof.spot_distance_px, prof.spot_index)])
        self.view.measure_layer.set_points(a_xy, b_xy)
        self._show_profile_dock()

    def show_azimuthal_profile(self, xy) -> None:
        """The intensity round the ring through ``xy`` (about the centre, with the calibration's distortion)."""
        from saedkit.core.detection.profiles import calculate_azimuthal_profile

        s = self._require()
        if s.centre is None:
            raise InputError("an azimuthal profile needs the centre: set it first (Centre tool or Analyse menu)")
        _, _, ell, _ = s.camera_constant
        c = (s.centre.x, s.centre.y)
        ideal = ell.correct_array(np.array([[xy[0] - c[0], xy[1] - c[1]]]))[0]
        r = float(np.hypot(*ideal))
        prof = calculate_azimuthal_profile(s.image.data, c, r, width_px=3.0, ellipse=ell, mask=s.mask)
        self.azimuthal_profile = prof
        k, _, _, source = s.camera_constant
        d_txt = f", d = {k / r:.4f} Å" if source != "none" and math.isfinite(k) else ""
        self.profile_plot.set_curve(prof.angle_deg, prof.intensity, x_name="azimuth (°)",
                                    title=f"ring R = {r:.1f} px{d_txt}, band 3 px")
        self._show_profile_dock()

    def _show_profile_dock(self) -> None:
        d = self.docks["profile"]
        if self.act_pattern_only.isChecked():
            self.act_pattern_only.setChecked(False)
        d.show()
        d.raise_()

    def _sync_table_action(self) -> None:
        self.act_table.blockSignals(True)
        self.act_table.setChecked(not self.docks["measurements"].isHidden())
        self.act_table.blockSignals(False)

    def show_table(self, on: bool = True) -> None:
        """Show (or hide) the measurement table."""
        d = self.docks["measurements"]
        if on and self.act_pattern_only.isChecked():
            self.act_pattern_only.setChecked(False)
        d.setVisible(bool(on))
        self._table_hidden_by_user = not on
        if self.act_table.isChecked() != bool(on):
            self.act_table.setChecked(bool(on))

    def toggle_pattern_only(self, on: bool) -> None:
        """Give the whole window to the pattern (hide every panel and the tool options), or bring them back."""
        if on:
            self._before_pattern_only = [d for d in self.docks.values() if not d.isHidden()]
            self._before_pattern_only += [self.tool_options] if not self.tool_options.isHidden() else []
            for w in self._before_pattern_only:
                w.hide()
            self.show_status("Pattern only: F11 brings the panels back.")
        else:
            for w in getattr(self, "_before_pattern_only", None) or [self.docks["calibration"], self.tool_options]:
                w.show()
            self._before_pattern_only = []
        if self.act_pattern_only.isChecked() != bool(on):
            self.act_pattern_only.setChecked(bool(on))

    def step_candidate(self, step: int) -> None:
        """Choose the next (+1) or previous (−1) zone-axis candidate, wrapping around the list."""
        s = self._require()
        if s.match is None or not s.match.candidates:
            self.show_status("No zone-axis candidates yet: search first (F6).")
            return
        n = len(s.match.candidates)
        now = s.chosen_candidate if s.chosen_candidate is not None else 0
        s.choose_candidate((now + int(step)) % n)
        c = s.candidate
        from saedkit.core.crystallography.crystal import format_indices

        zone = c.zone_four_index if c.zone_four_index is not None else c.zone
        self.show_status(f"Candidate {s.chosen_candidate + 1} of {n}: {c.phase} {format_indices(zone, brackets='[]')}, "
                         f"score {c.score:.3f}")

    def _require(self) -> Session:
        if self.session is None:
            raise InputError("open a pattern first (File ▸ Open, drop a file on the window, or Help ▸ demo)")
        return self.session

    def find_spot_at(self, xy, *, exact: bool = False, exclude: int | None = None, quiet: bool = False):
        """The spot at a click: snapped to a refined spot nearby, or exactly at the click."""
        s = self._require()
        from saedkit.core.detection.spots import Spot, snap_to_spot

        if exact:
            return Spot(float(xy[0]), float(xy[1]), 1.0, 1.0, math.nan, math.nan, math.nan, math.nan,
                        math.nan, math.nan, method="click")
        return snap_to_spot(s.image.data, (float(xy[0]), float(xy[1])), mask=s.mask,
                            search_radius_px=s.settings.snap_radius_px)

    def find_beam_at(self, xy):
        """The direct beam near a click, refined (a saturated or masked top is fitted on its flanks); None if none."""
        s = self._require()
        from saedkit.core.detection.spots import snap_to_spot

        try:
            return snap_to_spot(s.image.data, (float(xy[0]), float(xy[1])), mask=None,
                                search_radius_px=max(2.0 * s.settings.snap_radius_px, 12.0), spot_sigma_px=3.0)
        except SaedkitError:
            return None

    def paint_mask(self, points, radius_px: float, *, erase: bool = False) -> None:
        """Apply a brush stroke (discs along ``points``) to the mask: one undo step."""
        from saedkit.core.detection.masks import mask_disc

        s = self._require()
        pts = np.asarray(points, float).reshape(-1, 2)
        rows, cols = s.image.shape
        r = float(radius_px)
        x0 = max(int(math.floor(pts[:, 0].min() - r)) - 1, 0)
        x1 = min(int(math.ceil(pts[:, 0].max() + r)) + 2, cols)
        y0 = max(int(math.floor(pts[:, 1].min() - r)) - 1, 0)
        y1 = min(int(math.ceil(pts[:, 1].max() + r)) + 2, rows)
        if x0 >= x1 or y0 >= y1:
            return
        mask = np.array(s.mask)
        crop = mask[y0:y1, x0:x1]
        for x, y in pts:
            crop = mask_disc(crop, (x - x0, y - y0), r, value=not erase)
        mask[y0:y1, x0:x1] = crop
        s.set_mask(mask, label="Erase mask" if erase else "Paint mask")

    def fill_mask_polygon(self, vertices, *, erase: bool = False) -> None:
        from saedkit.core.detection.masks import mask_polygon

        s = self._require()
        s.set_mask(mask_polygon(s.mask, vertices, value=not erase),
                   label="Erase mask polygon" if erase else "Mask polygon")

    def set_brush_radius(self, r: float) -> None:
        self.opt_brush.setValue(r)

    def auto_mask(self) -> None:
        s = self._require()
        data, sat = s.image.data, s.image.saturation_value
        centre = None if s.centre is None else (s.centre.x, s.centre.y)

        def work(progress, should_stop):
            from saedkit.core.detection.masks import find_auto_mask

            return find_auto_mask(data, centre_xy=centre, saturation_value=sat)

        def done(mask):
            if self.session is s:
                combined = np.asarray(s.mask) | mask
                s.set_mask(combined, label="Automatic mask")
                self.show_status(f"Automatic mask: {int(mask.sum())} pixels.")

        self._submit("mask", "Masking saturated pixels and the beam stop", work, done)

    def save_detector_mask(self, camera: str | None = None) -> Path | None:
        """Save the current mask as the detector mask of a camera (asks its name): reused for its patterns."""
        from PySide6.QtWidgets import QInputDialog

        from saedkit.core.detection.detector_mask import detector_mask_path, write_detector_mask

        s = self._require()
        if not s.mask.any():
            raise InputError("the mask is empty: mask the detector's gaps, hot pixels or beam stop first")
        if camera is None:
            camera, ok = QInputDialog.getText(self, "Save detector mask",
                                              "Camera name (the mask is reused for its patterns of "
                                              f"{s.image.shape[1]}×{s.image.shape[0]} px):", text="camera")
            if not ok:
                return None
        path = detector_mask_path(_detector_mask_folder(), camera, s.image.shape)
        write_detector_mask(path, s.mask, camera=camera)
        self.show_status(f"Saved the detector mask of '{camera}' ({int(s.mask.sum())} px) to {path}; "
                         "it is applied to every pattern of this size opened from now on.")
        return path

    def clear_mask(self) -> None:
        self._require().set_mask(None, label="Clear mask")

    # ================================================================== analysis

    def centre_from_rings(self) -> None:
        s = self._require()
        data, mask = s.image.data, s.mask
        guess = None if s.centre is None else (s.centre.x, s.centre.y)

        def work(progress, should_stop):
            from saedkit.core.detection.rings import find_rings

            return find_rings(data, mask=mask, centre_guess_xy=guess, progress=progress, should_stop=should_stop)

        def done(fit):
            if self.session is not s:
                return
            with s.transaction("Centre from rings"):
                s.set_ring_fit(fit)
                s.set_centre(fit.centre)
            self.notify(f"Centre from {len(fit.rings)} rings: ({fit.centre.x:.2f}, {fit.centre.y:.2f}) ± "
                        f"({fmt_sigma(fit.centre.sigma_x)}, {fmt_sigma(fit.centre.sigma_y)}) px.", "success")

        self._submit("centre", "Fitting the rings", work, done)

    def centre_from_friedel(self) -> None:
        s = self._require()
        data, mask = s.image.data, s.mask
        guess = None if s.centre is None else (s.centre.x, s.centre.y)

        def work(progress, should_stop):
            find_centre_spots = _needs("saedkit.core.detection.centre", "find_centre_spots")
            return find_centre_spots(data, mask=mask, guess_xy=guess)

        def done(c):
            if self.session is not s:
                return
            s.set_centre(c, label="Centre from Friedel pairs")
            self.notify(f"Centre from {c.n_used} Friedel pairs: ({c.x:.2f}, {c.y:.2f}) ± "
                        f"({fmt_sigma(c.sigma_x)}, {fmt_sigma(c.sigma_y)}) px.", "success")

        self._submit("centre", "Finding the centre", work, done)

    def find_spots(self, *, then: Callable[[Session], None] | None = None) -> None:
        """Find the spots automatically (replaces the found ones, keeps those placed by hand)."""
        s = self._require()
        data, mask = s.image.data, s.mask
        centre = None if s.centre is None else (s.centre.x, s.centre.y)
        min_snr = s.settings.min_snr
        want_centre = s.centre is None

        def work(progress, should_stop):
            from saedkit.core.detection.spots import find_spots

            spots = find_spots(data, mask=mask, centre_xy=centre, min_snr=min_snr, progress=progress,
                               should_stop=should_stop)
            c = None
            if want_centre and len(spots) >= 4:
                try:
                    find_centre_spots = _needs("saedkit.core.detection.centre", "find_centre_spots")
                    c = find_centre_spots(data, mask=mask)
                except SaedkitError:
                    c = None
            return spots, c

        def done(result):
            spots, c = result
            if self.session is not s:
                return
            with s.transaction("Find spots"):
                s.set_spots(spots, keep_manual=True)
                if c is not None and s.centre is None:
                    s.set_centre(c)
            if s.spots and self.docks["measurements"].isHidden() and not self._table_hidden_by_user \
                    and not self.act_pattern_only.isChecked():
                self.docks["measurements"].show()
            kept = sum(1 for o in s.spot_origins if o == "manual")
            self.show_status(f"Found {len(spots)} spots" + (f"; kept the {kept} placed by hand (Undo brings back "
                                                              "the spots as they were)." if kept else "."))
            if not spots:
                self.notify(f"No spots above S/N {min_snr:g} were found. Lower the smallest S/N or add "
                            "spots by hand with the Spot tool.", "warning")
            if then is not None:
                then(s)

        self._submit("spots", "Finding spots", work, done)

    def search(self) -> None:
        """Run the zone-axis search over the ticked phases."""
        s = self._require()
        from saedkit.core.detection.centre import CentreResult

        if len(s.spots) < 2:
            raise InputError("the search needs at least two spots besides the central beam: "
                             "find spots (F5) or add them with the Spot tool")
        state = s.state
        st = s.settings
        names = _phases_to_search(s)
        xy = s.spots_xy
        sig = np.array([math.hypot(sp.sigma_x, sp.sigma_y) / math.sqrt(2) for sp in s.spots])
        sig = np.where(np.isfinite(sig) & (sig > 0), sig, 1.0)
        cal = s.calibration
        k = None if cal is None else float(cal.camera_constant_px_A)
        sk = None
        if cal is not None:
            _, sk_val, _, _ = s.camera_constant
            sk = sk_val if math.isfinite(sk_val) else None
        ell = getattr(cal, "ellipse", None) if cal is not None else None
        data, mask = s.image.data, s.mask
        centre0 = s.centre

        def work(progress, should_stop):
            from saedkit.core.crystallography.library import find_phase
            from saedkit.core.indexing.matching import match_zone_axes

            phases = [find_phase(n) for n in names]
            centre = centre0
            if centre is None:
                find_centre_spots = _needs("saedkit.core.detection.centre", "find_centre_spots")
                centre = find_centre_spots(data, mask=mask)
            kwargs = {}
            if ell is not None:
                kwargs["ellipse"] = ell
            match = match_zone_axes(xy, (centre.x, centre.y), phases, camera_constant_px_A=k,
                                    camera_constant_sigma_px_A=sk, voltage_kv=st.voltage_kv,
                                    d_tolerance_pct=st.d_tolerance_pct, angle_tolerance_deg=st.angle_tolerance_deg,
                                    max_index=st.max_index, top=st.top, spots_sigma_px=sig,
                                    image_shape=data.shape, mask=mask, progress=progress,
                                    should_stop=should_stop, **kwargs)
            return match, centre

        def done(result):
            match, centre = result
            if self.session is not s:
                return
            same = (s.state.spots is state.spots and s.state.centre is state.centre
                    and s.state.calibration is state.calibration)
            with s.transaction("Search zone axes"):
                lat = match.lattice
                if same and lat is not None and np.all(np.isfinite(lat.centre_sigma_px)):
                    s.set_centre(CentreResult(float(lat.centre_xy[0]), float(lat.centre_xy[1]),
                                              float(lat.centre_sigma_px[0]), float(lat.centre_sigma_px[1]),
                                              "spot-lattice", int(np.sum(lat.inliers))))
                elif s.centre is None:
                    s.set_centre(centre)
                s.set_match(match, current=same)
            if not match.candidates:
                self.notify("No zone axis of the phases searched explains these spots within the tolerances. "
                            "Check the centre and the spots, widen the tolerances or tick more phases.", "warning")
            else:
                b = match.candidates[0]
                zone = b.zone_four_index if b.zone_four_index is not None else b.zone
                from saedkit.core.crystallography.crystal import format_indices

                self.notify(f"Best candidate: {b.phase} {format_indices(zone, brackets='[]')}, score {b.score:.3f}, "
                            f"{b.n_explained} of {b.n_spots} spots explained ({len(match.candidates)} "
                            f"candidate{'s' if len(match.candidates) != 1 else ''}"
                            + ("" if s.phases else f"; none ticked: all {len(names)} phases of the library")
                            + ")."
                            + (" Choose another in the Zone-axis search panel to compare its grid."
                               if len(match.candidates) > 1 else ""), "success")
            if not same:
                self.notify("The spots or the centre changed while the search ran: search again.", "warning")
            self.docks["search"].raise_()

        self._submit("search", "Searching zone axes", work, done)

    def calibrate(self) -> None:
        """Fit the rings of the standard and find the camera constant."""
        s = self._require()
        st = s.settings
        standard = self.calibration_panel.standard_key() or st.standard
        image = s.masked_image
        mask = s.mask

        def work(progress, should_stop):
            from saedkit.core.crystallography.library import find_phase

            calibrate_from_rings = _needs("saedkit.core.calibration.calibrate", "calibrate_from_rings")
            phase = find_phase(standard)
            return calibrate_from_rings(image, phase, voltage_kv=st.voltage_kv, mask=mask,
                                        pixel_size_um=st.pixel_size_um, progress=progress,
                                        should_stop=should_stop)

        def done(cal):
            if self.session is not s:
                return
            with s.transaction("Calibrate from rings"):
                if standard != s.settings.standard:
                    s.set_settings(standard=standard)
                s.set_calibration(cal, use_centre=True)
            from saedkit.core.calibration.camera import camera_terms

            t = camera_terms(cal)
            msg = (f"Camera constant K = {fmt_pm(t.camera_constant_px_A, t.total_sigma_px_A, 2)} px·Å "
                   f"(fit {fmt_sigma(t.stat_sigma_px_A)}, reproducibility {t.reproducibility_pct:.2g} %)")
            warnings = list(getattr(cal, "warnings", ()) or ())
            self.notify(msg + "." + ("".join(f"\n⚠ {w}" for w in warnings)), "warning" if warnings else "success")
            self.docks["calibration"].raise_()

        self._submit("calibrate", "Calibrating", work, done)

    def identify_phases(self) -> None:
        """Fit the rings, turn their radii into d with the camera constant, and rank the phases that explain them.

        Uses the phases ticked in the Phases panel, or the whole built-in
        library when none is ticked. Without a calibration or a typed-in K it
        only says what is missing.
        """
        s = self._require()
        k, _, _, source = s.camera_constant
        if source != "calibration" or not math.isfinite(k):
            self.notify("Identifying phases from rings needs a camera constant to turn ring radii into "
                        "d-spacings: calibrate on a standard first (F7 on a gold or aluminium film, or apply a "
                        "saved calibration) or type a known K in the Camera constant panel.", "warning",
                        actions=[("Camera constant panel", lambda: self.docks["calibration"].raise_())])
            return
        names = _phases_to_search(s)
        tol = self.ring_phases_panel.tolerance_pct()
        mixtures = self.ring_phases_panel.use_mixtures()
        data, mask = s.image.data, s.mask
        guess = None if s.centre is None else (s.centre.x, s.centre.y)

        def work(progress, should_stop):
            from saedkit.core.errors import FitError
            from saedkit.core.indexing.identify import identify_phases
            from saedkit.core.crystallography.library import find_phase
            from saedkit.core.detection.rings import find_rings

            phases = [find_phase(n) for n in names]
            fit = find_rings(data, mask=mask, centre_guess_xy=guess, progress=progress, should_stop=should_stop)
            if not fit.rings:
                raise FitError("no rings were found on this pattern: check the mask and the display, or use the "
                               "zone-axis search for a spot pattern")
            # camera equation R·d = K (DESIGN.md), on the ellipse-corrected ring radii
            d = [k / r.radius_px for r in fit.rings]
            pid = identify_phases(d, phases, intensities=[max(r.height, 0.0) for r in fit.rings],
                                  d_tolerance_pct=tol, mixtures=mixtures)
            return fit, pid

        def done(result):
            fit, pid = result
            if self.session is not s:
                return
            with s.transaction("Identify phases from rings"):
                s.set_ring_fit(fit)
                if s.centre is None:
                    s.set_centre(fit.centre)
                s.set_phase_id(pid)
            self.ring_phases_panel.choose_row(0)
            best = pid.best
            if best is None or best.score <= 0:
                self.notify(f"No phase explains these {len(fit.rings)} rings within {tol:g} %. Check the camera "
                            "constant, widen the tolerance or tick other phases.", "warning")
            else:
                self.notify(f"Best: {' + '.join(p.split('/')[-1] for p in best.phases)}, score {best.score:.3f}, "
                            f"{100 * best.fraction_explained:.0f} % of the ring intensity explained, "
                            f"{100 * best.fraction_seen:.0f} % of its strong rings seen, Δd {best.d_error_pct:.2f} % "
                            f"({len(fit.rings)} rings, {len(names)} phases).", "success")
            self.docks["ring_phases"].raise_()

        self._submit("identify", "Identifying phases from rings", work, done)

    def use_camera_constant(self, k: float, sigma: float = 0.0) -> None:
        s = self._require()
        s.set_camera_constant(k, sigma_px_A=sigma)

    # ------------------------------------------------------------------ calibration library

    def _library(self):
        return _needs("saedkit.core.calibration.library", "CalibrationLibrary")()

    def calibration_names(self) -> list[str]:
        try:
            items = self._library().list()
        except SaedkitError:
            return []
        return [getattr(c, "name", str(c)) for c in items]

    def apply_saved_calibration(self, name: str) -> None:
        s = self._require()
        saved = self._library().get(name)
        s.set_calibration(saved, label=f"Apply calibration {name}")
        self.show_status(f"Applied the calibration '{name}': K = {saved.camera_constant_px_A:.2f} px·Å.")

    def delete_saved_calibration(self, name: str) -> None:
        ans = QMessageBox.question(self, "Delete calibration", f"Delete the saved calibration '{name}'?")
        if ans != QMessageBox.StandardButton.Yes:
            return
        self._library().delete(name)
        self.calibration_panel.refresh_library()

    def save_calibration_to_library(self) -> None:
        s = self._require()
        cal = s.calibration
        if cal is None or not hasattr(cal, "profile"):
            raise InputError("only a calibration fitted on this pattern can be saved: fit the rings first")
        SavedCalibration = _needs("saedkit.core.calibration.library", "SavedCalibration")
        st = s.settings
        nominal = float(getattr(s.image, "camera_length_mm", None) or 0.0)
        dlg = SaveCalibrationDialog(self, name=f"{st.voltage_kv:g} kV" + (f" CL {nominal:g} mm" if nominal else ""),
                                    nominal_mm=nominal)
        if dlg.exec() != QDialog.DialogCode.Accepted:
            return
        name = dlg.name.text().strip()
        if not name:
            raise InputError("give the calibration a name")
        saved = SavedCalibration.from_calibration(cal, name=name, instrument=dlg.instrument.text().strip(),
                                                  nominal_camera_length_mm=dlg.nominal.value() or None,
                                                  binning=dlg.binning.value())
        self._library().save(saved, overwrite=dlg.overwrite.isChecked())
        self.calibration_panel.refresh_library()
        self.show_status(f"Saved the calibration '{name}' to the library.")

    # ------------------------------------------------------------------ phases

    def ask_open_cif(self) -> str:
        path, _ = QFileDialog.getOpenFileName(self, "Choose a CIF file", "", "CIF files (*.cif);;All files (*)")
        return path

    def add_cif_phase(self) -> None:
        from saedkit.core.crystallography.crystal import read_phase_cif

        path = self.ask_open_cif()
        if not path:
            return
        phase = read_phase_cif(path)
        self.phases_panel.add_phase_item(path, f"{phase.name} — {phase.space_group.hm} — {Path(path).name}")
        if self.session is not None:
            self.session.set_phases(self.phases_panel.checked())

    def new_phase_from_cell(self) -> None:
        dlg = NewPhaseDialog(self)
        if dlg.exec() != QDialog.DialogCode.Accepted or dlg.phase is None:
            return
        self.add_typed_phase(dlg.phase)

    def add_typed_phase(self, phase) -> str:
        """Keep a typed-in phase as a CIF in the data folder and tick it; returns the CIF path."""
        from saedkit.core._atomic import write_text_atomic
        from saedkit.core.workflow.session import data_dir

        safe = "".join(ch if ch.isalnum() or ch in "-_" else "_" for ch in phase.name) or "phase"
        path = data_dir() / "phases" / f"{safe}.cif"
        write_text_atomic(path, phase.to_cif())
        self.phases_panel.add_phase_item(str(path), f"{phase.name} — {phase.space_group.hm} — typed in")
        if self.session is not None:
            self.session.set_phases(self.phases_panel.checked())
        return str(path)

    # ================================================================== demo

    def open_demo(self, which: str = "session") -> None:
        """Open the demo: the calibrated gold film's calibration applied to an unknown grain."""
        if not self._confirm_discard():
            return
        ensure_demo_files = _needs("saedkit.demo", "ensure_demo_files")

        def work(progress, should_stop):
            return ensure_demo_files()

        def done(files):
            if which == "film":
                self.open_path(files.film, confirm=False, then=lambda s: self._demo_prepare(s, files, film=True))
            elif which in ("grain_a", "grain_b", "session"):
                path = files.grain_b if which == "grain_b" else files.grain_a
                self.open_path(path, confirm=False, then=lambda s: self._demo_prepare(s, files))

        self._submit("demo", "Preparing the demo patterns", work, done)

    def _demo_prepare(self, s: Session, files, *, film: bool = False) -> None:
        with s.transaction("Demo set-up"):
            s.set_settings(voltage_kv=files.voltage_kv, pixel_size_um=files.pixel_size_um,
                           standard=getattr(files, "standard", "Au"))
            if not film:
                s.set_phases(list(getattr(files, "grain_phases", ("Ni", "Fe", "Cu", "Al", "Si"))))
        if film:
            self.notify("The demo gold film: press Calibrate from rings (F7), or Fit rings in the Camera "
                        "constant panel, to fit its rings against Au.", "info")
            return
        name = getattr(files, "calibration_name", None)
        if name:
            try:
                self.apply_saved_calibration(name)
            except SaedkitError as exc:
                self.notify(f"The demo calibration could not be applied: {exc}", "warning")
        self.calibration_panel.refresh_library()
        s.mark_saved()

        def ready(_s):
            _s.mark_saved()  # the demo as prepared counts as unchanged
            self.notify("Demo: the gold film's calibration is applied and the spots of an unknown grain are "
                        "found. Press Search zone axes (F6) to index it.", "info")

        self.find_spots(then=ready)

    # ================================================================== tools

    def set_tool(self, name: str) -> None:
        tool = self.tools[name]
        if self.tool is not None and self.tool is not tool:
            self.tool.deactivate()
        self.tool = tool
        self.view.tool = tool
        tool.activate()
        a = self.tool_actions[name]
        if not a.isChecked():
            a.setChecked(True)
        for key, acts in self._opt_actions.items():
            for act in acts:
                act.setVisible(key == name)
        self.opt_hint.setText(tool.hint)

    # ================================================================== read-out

    def readout_text(self, x: float, y: float) -> str:
        """The cursor read-out at image point (x, y): position, intensity, R, azimuth, d and |g| ("" outside)."""
        s = self.session
        if s is None:
            return ""
        r = s.describe_point(x, y)
        if not r.inside:
            return ""
        parts = [f"x {x:7.1f}", f"y {y:7.1f}", f"I {r.value:.5g}" + (" (masked)" if r.masked else "")]
        if math.isfinite(r.radius_px):
            parts.append(f"R {r.radius_px:.1f} px")
            parts.append(f"φ {r.angle_deg:.1f}°")
        if math.isfinite(r.d_A):
            parts.append(f"d {r.d_A:.4f} Å")
            parts.append(f"|g| {r.g_per_nm:.3f} nm⁻¹")
        return "   ".join(parts)

    def _cursor_moved(self, x: float, y: float) -> None:
        text = self.readout_text(x, y)
        self.readout.setText(text)
        if self.act_magnifier.isChecked() and text:
            pos = self.view.mapFromScene(QPointF(x, y))
            self.magnifier.show_at(self.view.image_item._buffer, self.view._image_step, (x, y), pos)
        else:
            self.magnifier.hide()

    def _cursor_left(self) -> None:
        self.readout.setText("")
        self.magnifier.hide()

    # ================================================================== misc dialogs

    def preferences(self) -> None:
        dlg = PreferencesDialog(self.prefs, self, can_apply=self.session is not None)
        if dlg.exec() != QDialog.DialogCode.Accepted:
            return
        self.prefs = dlg.result_settings()
        app_prefs.write_preferences(self.prefs)
        if self.session is not None and dlg.apply_now.isChecked():
            self.session.set_settings(self.prefs, label="Apply preferences")

    def _show_help(self) -> None:
        lines = ["<b>Mouse</b>: wheel zooms around the cursor; middle-drag pans (any tool); "
                 "left-drag pans with the Pan tool."]
        for cls in TOOL_CLASSES:
            lines.append(f"<b>{cls.title}</b>: {cls.hint}")
        lines.append("<b>Keys</b>: Ctrl+2…7 choose a tool; F5 find spots; F6 search; F7 calibrate; F8 identify phases; "
                     "Ctrl+0 fit; Ctrl+1 actual pixels; Ctrl+C in the table copies it.")
        QMessageBox.information(self, "Mouse and keys", "<br><br>".join(lines))

    def shortcut_rows(self) -> list[tuple[str, str, str]]:
        """(menu, command, keys) of every command with a key, menu by menu, for the shortcut sheet."""
        rows = []
        seen = set()
        for menu_action in self.menuBar().actions():
            menu = menu_action.menu()
            if menu is None:
                continue
            stack = [(menu_action.text().replace("&", ""), menu)]
            while stack:
                title, m = stack.pop(0)
                for a in m.actions():
                    if a.menu() is not None:
                        stack.append((f"{title} ▸ {a.text().replace('&', '')}", a.menu()))
                        continue
                    keys = ", ".join(k.toString(QKeySequence.SequenceFormat.NativeText) for k in a.shortcuts())
                    if keys and id(a) not in seen:
                        seen.add(id(a))
                        rows.append((title, a.text().replace("&", "").split("\t")[0], keys))
        rows.append(("Pattern", "Zoom round the cursor", "mouse wheel"))
        rows.append(("Pattern", "Pan with any tool", "middle-drag"))
        rows.append(("Measurement table", "Copy the selected rows", QKeySequence(QKeySequence.StandardKey.Copy)
                     .toString(QKeySequence.SequenceFormat.NativeText)))
        return rows

    def show_shortcuts(self) -> None:
        """The keyboard shortcut sheet (Help ▸ Keyboard shortcuts, F1), built from the menus themselves."""
        from PySide6.QtWidgets import QDialogButtonBox, QHeaderView, QTableWidget, QTableWidgetItem

        dlg = QDialog(self)
        dlg.setWindowTitle("Keyboard shortcuts")
        rows = self.shortcut_rows()
        table = QTableWidget(len(rows), 3, dlg)
        table.setHorizontalHeaderLabels(["Where", "Command", "Keys"])
        table.verticalHeader().setVisible(False)
        table.setEditTriggers(QTableWidget.EditTrigger.NoEditTriggers)
        for i, row in enumerate(rows):
            for j, v in enumerate(row):
                table.setItem(i, j, QTableWidgetItem(v))
        table.horizontalHeader().setSectionResizeMode(QHeaderView.ResizeMode.ResizeToContents)
        table.horizontalHeader().setStretchLastSection(True)
        buttons = QDialogButtonBox(QDialogButtonBox.StandardButton.Close)
        buttons.rejected.connect(dlg.reject)
        lay = QVBoxLayout(dlg)
        lay.addWidget(table)
        lay.addWidget(buttons)
        dlg.resize(560, 640)
        self.shortcut_sheet = dlg
        dlg.show()

    def _about(self) -> None:
        from saedkit import __version__

        QMessageBox.about(self, "About saedkit",
                          f"<b>saedkit {__version__}</b><br>Measure, calibrate and index selected-area electron "
                          "diffraction patterns.<br><br>Results are measurements to be checked by a trained "
                          "person before use.")

    # ================================================================== window state, drag & drop, close

    def _restore_window_state(self) -> None:
        st = app_prefs.app_settings()
        geo = st.value("window/geometry")
        state = st.value("window/state")
        self._state_restored = False
        if isinstance(geo, QByteArray):
            self.restoreGeometry(geo)
        if isinstance(state, QByteArray):
            self._state_restored = self.restoreState(state, _LAYOUT_VERSION)

    def showEvent(self, event) -> None:  # noqa: N802
        super().showEvent(event)
        if not getattr(self, "_docks_sized", False):
            self._docks_sized = True
            if not self._state_restored:
                side = max(340, min(440, int(0.27 * self.width())))
                self.resizeDocks([self.docks["calibration"]], [side], Qt.Orientation.Horizontal)
                self.resizeDocks([self.docks["measurements"]], [220], Qt.Orientation.Vertical)

    def dragEnterEvent(self, event) -> None:  # noqa: N802
        if event.mimeData().hasUrls():
            event.acceptProposedAction()

    def dropEvent(self, event) -> None:  # noqa: N802
        paths = [u.toLocalFile() for u in event.mimeData().urls() if u.isLocalFile()]
        if paths:
            self.guard(lambda: self.open_path(paths[0]))

    def closeEvent(self, event) -> None:  # noqa: N802
        if not self._confirm_discard():
            event.ignore()
            return
        st = app_prefs.app_settings()
        st.setValue("window/geometry", self.saveGeometry())
        st.setValue("window/state", self.saveState(_LAYOUT_VERSION))
        st.sync()
        self.runner.cancel()
        self.runner.wait(5000)
        self._autosave_timer.stop()
        remove_autosave()
        if self._unsubscribe is not None:
            self._unsubscribe()
            self._unsubscribe = None
        event.accept()

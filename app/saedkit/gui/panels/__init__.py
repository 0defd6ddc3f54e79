"""The step panels (docks): display, calibration, phases, zone-axis search, phases from rings, measurements.

One module per panel. Panels show the session and send edits back through the
main window (``ctx``); they compute nothing themselves.
"""

from saedkit.gui.panels._common import INDICES_ROLE, IndicesDelegate, fmt_pm, fmt_sigma
from saedkit.gui.panels.calibration import CalibrationPanel
from saedkit.gui.panels.display import DisplayPanel
from saedkit.gui.panels.measurements import MeasurementModel, MeasurementsPanel
from saedkit.gui.panels.phases import PhasesPanel
from saedkit.gui.panels.ring_phases import RingPhasesPanel
from saedkit.gui.panels.search import SearchPanel

__all__ = ["DisplayPanel", "CalibrationPanel", "PhasesPanel", "SearchPanel", "RingPhasesPanel",
           "MeasurementsPanel", "MeasurementModel", "fmt_pm", "fmt_sigma", "IndicesDelegate", "INDICES_ROLE"]

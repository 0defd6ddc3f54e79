"""Small widget behaviours shared by the panels."""

from __future__ import annotations

from PySide6.QtCore import QEvent, QObject, Qt
from PySide6.QtWidgets import QAbstractScrollArea, QAbstractSpinBox, QApplication, QComboBox, QSlider, QWidget

__all__ = ["WheelGuard", "guard_wheel"]

_GUARDED = (QComboBox, QAbstractSpinBox, QSlider)


class WheelGuard(QObject):
    """Scrolling a panel never changes the drop-down, number or slider under the cursor.

    A guarded widget takes wheel events only when it has the keyboard focus
    (clicked or tabbed into); otherwise the wheel scrolls the panel around it.
    """

    def eventFilter(self, obj: QObject, event: QEvent) -> bool:  # noqa: N802
        if event.type() != QEvent.Type.Wheel or not isinstance(obj, _GUARDED) or obj.hasFocus():
            return False
        parent = obj.parentWidget()
        while parent is not None and not isinstance(parent, QAbstractScrollArea):
            parent = parent.parentWidget()
        if parent is not None:
            QApplication.sendEvent(parent.verticalScrollBar(), event)
        return True


def guard_wheel(root: QWidget) -> WheelGuard:
    """Install one :class:`WheelGuard` on every combo box, spin box and slider under ``root``."""
    guard = getattr(root, "_wheel_guard", None)
    if guard is None:
        guard = WheelGuard(root)
        root._wheel_guard = guard
    for cls in _GUARDED:
        for w in root.findChildren(cls):
            w.setFocusPolicy(Qt.FocusPolicy.StrongFocus)
            w.installEventFilter(guard)
    return guard

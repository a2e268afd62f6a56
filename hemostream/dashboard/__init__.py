"""The unit dashboard: a rich terminal view of every bed, its values, trends and alarms."""

from .app import Dashboard, UIState, decode_keys, handle_key
from .model import BedState, UnitView
from .render import CAUTION, Screen, bed_screen, unit_screen

__all__ = ["CAUTION", "BedState", "Dashboard", "Screen", "UIState", "UnitView", "bed_screen",
           "decode_keys", "handle_key", "unit_screen"]

"""hemostream: a hemodynamic monitoring stream processor."""
__version__ = "0.1.0"

#: the caution every command, screen and report carries
CAUTION = ("hemostream is a secondary display and notification aid, not a medical device. "
           "The bedside monitor stays the primary alarm source; confirm every value and alarm "
           "there, and follow local policy and licensed clinical judgement.")

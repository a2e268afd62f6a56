"""Intake paths other than MQTT JSON that feed the same core (see :mod:`.hl7`)."""

"""HL7 v2 intake: IHE PCD-01 (ORU^R01 over MLLP) with IEEE 11073-10101 terms, into the core.

- :mod:`.mapping`: parse (the ``hl7`` package) and map a message to wire-format ``obs``
  messages, fed to :meth:`hemostream.core.processor.Processor.feed` like MQTT JSON.
- :mod:`.mllp`: the asyncio MLLP listener; ACK (MSA AA/AE/AR) only after the commit.
- :mod:`.files`: files of HL7 messages (replay) and the PCD-01 writer for the simulators.
- :mod:`.terms`: the MDC term table ``mdc.csv``; :mod:`.config`: ``[intake.hl7]``.

See docs/hl7.md.
"""

"""The live service: hemostream over a real MQTT broker or an in-process one.

:mod:`.transport` is the small interface both sides share, :mod:`.mqtt` the broker client
(aiomqtt over paho-mqtt, acknowledging each message only after it is stored),
:mod:`.inproc` the in-process broker of the demo, :mod:`.service` the pipeline that joins a
transport to the processing core and the database, :mod:`.health` its health figures and
:mod:`.publish` a recording publisher. The commands, the demo and the dashboard feed are
wired in :mod:`hemostream.app`; nothing here imports the dashboard.
"""

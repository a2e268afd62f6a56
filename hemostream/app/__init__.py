"""The composition root: the one place that wires the core, storage, the live transport, the
dashboard and the review tools together into the ``hemostream`` commands.

Imports go one way: ``app`` -> ``live`` / ``dashboard`` / ``review`` / ``replay`` / ``store``
-> ``core``. :mod:`.cli` registers every command; :mod:`.demo` is ``hemostream demo`` (a
simulated ward through the live pipeline); :mod:`.watch` feeds the dashboard from a broker.
"""

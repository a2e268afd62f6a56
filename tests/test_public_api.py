"""The small public interface (DEVELOPERS.md): every name in ``__all__`` of ``hemostream`` and
``hemostream.core`` resolves, and importing the core's wire format loads no shell module."""

import subprocess
import sys

import hemostream
import hemostream.core as core


def test_every_public_name_resolves():
    for mod in (hemostream, core):
        for name in mod.__all__:
            assert getattr(mod, name) is not None, (mod.__name__, name)


def test_the_core_loads_without_the_shell():
    code = ("import sys, hemostream.core.wire, hemostream.core.processor; "
            "shell = [m for m in sys.modules if m.split('.')[:2] in (['hemostream', 'live'], "
            "['hemostream', 'store'], ['hemostream', 'app'], ['hemostream', 'dashboard'])]; "
            "print(shell); assert not shell and 'sqlalchemy' not in sys.modules")
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert r.returncode == 0, r.stdout + r.stderr

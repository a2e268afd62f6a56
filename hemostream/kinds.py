"""The kinds of stored rows ``hemostream query`` lists, in the order its help names them.

A module of its own so that the command line's parser names them without importing the
store (:mod:`hemostream.query` reads them)."""

from __future__ import annotations

KINDS = ("observations", "derived", "rejected", "notes", "alarms", "admissions", "commands",
         "configs")

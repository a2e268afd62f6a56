"""The IEEE 11073-10101 terms the HL7 intake reads: loaded from the one table, ``mdc.csv``.

Every row names its source and how far it was checked (see the file's header). A term that is
not in the table is rejected for that observation, never guessed.
"""

from __future__ import annotations

import csv
import io
from dataclasses import dataclass
from functools import lru_cache
from importlib import resources


@dataclass(frozen=True)
class Term:
    kind: str          # "param" or "unit"
    code: int          # 32-bit MDC code (partition * 65536 + term code)
    ref_id: str        # reference id, e.g. MDC_PRESS_BLD_ART_ABP_SYS
    maps_to: str       # wire-format parameter, or UCUM code
    writer: str        # "" | "*" | "HR PR" ...
    checked: str
    source: str


class Terms:
    """Look-ups both ways: OBX-3/OBX-6 identifiers to terms, and targets to writer terms."""

    def __init__(self, rows: list[Term]) -> None:
        self.rows = rows
        self.by_code: dict[tuple[str, int], Term] = {}
        self.by_ref: dict[tuple[str, str], Term] = {}
        self.writer_terms: dict[tuple[str, str], Term] = {}
        for t in rows:
            self.by_code.setdefault((t.kind, t.code), t)
            if (t.kind, t.ref_id) in self.by_ref:
                raise ValueError(f"mdc.csv: reference id {t.ref_id} appears twice")
            self.by_ref[(t.kind, t.ref_id)] = t
            if t.writer == "*":
                key = (t.kind, t.maps_to)
                if key in self.writer_terms:
                    raise ValueError(f"mdc.csv: two preferred rows for {t.maps_to}")
                self.writer_terms[key] = t
            elif t.writer:
                for p in t.writer.split():
                    self.writer_terms[(t.kind, f"{t.maps_to}@{p}")] = t

    def lookup(self, kind: str, code: str, ref_id: str) -> tuple[Term | None, str]:
        """The term for an identifier given as a numeric code and/or a reference id.

        Returns (term, "") or (None, why). When both are given they must name the same code.
        """
        by_code = by_ref = None
        if code.isdigit():
            by_code = self.by_code.get((kind, int(code)))
        elif code and not ref_id:
            ref_id, code = code, ""
        if ref_id:
            by_ref = self.by_ref.get((kind, ref_id))
        if code.isdigit() and ref_id:
            if by_code is None and by_ref is None:
                return None, f"{code}^{ref_id}"
            if by_code is None or by_ref is None or by_code.code != by_ref.code:
                known = by_ref or by_code
                assert known is not None          # not both None: checked above
                return None, (f"{code}^{ref_id} (code and reference id disagree; the table "
                              f"has {known.code}^{known.ref_id})")
            return by_ref, ""
        t = by_code or by_ref
        return (t, "") if t is not None else (None, code or ref_id or "(empty)")

    def for_param(self, param: str) -> Term:
        return self.writer_terms[("param", param)]

    def for_unit(self, ucum: str, param: str) -> Term:
        return (self.writer_terms.get(("unit", f"{ucum}@{param}"))
                or self.writer_terms[("unit", ucum)])


def parse_table(text: str) -> Terms:
    lines = [ln for ln in text.splitlines() if ln.strip() and not ln.startswith("#")]
    rows = []
    for r in csv.DictReader(io.StringIO("\n".join(lines))):
        rows.append(Term(kind=r["kind"], code=int(r["code"]), ref_id=r["ref_id"],
                         maps_to=r["maps_to"], writer=r["writer"].strip(),
                         checked=r["checked"], source=r["source"]))
    return Terms(rows)


@lru_cache(maxsize=1)
def load_terms() -> Terms:
    """The shipped table (package data ``hemostream/intake/hl7/mdc.csv``)."""
    try:
        text = resources.files(__package__).joinpath("mdc.csv").read_text("utf-8")
    except FileNotFoundError:   # pragma: no cover - a packaging mistake
        raise RuntimeError("hemostream/intake/hl7/mdc.csv is missing from the installation "
                           "(package data)") from None
    return parse_table(text)

"""Keeping patient identifiers out of free-text DICOM values.

Free-text attributes such as SeriesDescription are typed by people and sometimes carry
the patient's name or ID ("CHEST SMITH 12345"). When a site has not asked for
identifiers, reconaudit removes them from such text before it reaches a record, a file
name or a report: every whole-word occurrence of the PatientID or of a component of
the PatientName (family name, given names, ... as the DICOM person name separates them
with "^", PS3.5 6.2; each taken whole, at least 3 characters), compared without regard
to case, is replaced by :data:`WITHHELD`. Components are not split at spaces, so a
phantom registered as "QA^WATER PHANTOM" withholds the phrase "WATER PHANTOM", not
every use of "water". This catches a name or ID copied into the text; it cannot catch
one spelled differently, so the README tells sites not to rely on it alone.
"""
from __future__ import annotations

import re
from typing import Iterable

WITHHELD = "[withheld]"

_COMPONENTS = re.compile(r"[\^=]")


def identifier_words(patient_name: object, patient_id: object) -> list[str]:
    """The words to withhold: the PatientID and the components of PatientName (>= 3 chars)."""
    words: set[str] = set()
    name = "" if patient_name is None else str(patient_name)
    words.update(w for w in (c.strip() for c in _COMPONENTS.split(name)) if len(w) >= 3)
    pid = "" if patient_id is None else str(patient_id).strip()
    if len(pid) >= 3:
        words.add(pid)
    return sorted(words, key=lambda w: (-len(w), w))


def withhold_words(text: str, words: Iterable[str]) -> str:
    """``text`` with each whole-word, case-insensitive occurrence of ``words`` withheld."""
    words = [w for w in words if w]
    if not text or not words:
        return text
    pattern = re.compile(r"(?<![0-9A-Za-z])(?:" + "|".join(re.escape(w) for w in words) + r")(?![0-9A-Za-z])",
                         re.IGNORECASE)
    return pattern.sub(WITHHELD, text)

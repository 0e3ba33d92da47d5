"""JUnit XML for CI systems: one test suite, one test case per item.

The de-facto JUnit XML layout read by CI servers (Jenkins, GitLab, GitHub annotations):
``<testsuites><testsuite name tests failures errors time><testcase classname name time>``
with an optional ``<failure message type>`` (the check ran and did not pass) or
``<error message type>`` (the check could not run: crash, timeout) child holding details
as text. Written atomically (:func:`adapt.io.atomic_write_bytes`).

Checkable fact (tested in tests/test_reference.py): the file parses with
``xml.etree.ElementTree`` and its counts equal the number of items, failures and errors.
"""
from __future__ import annotations

import os
import xml.etree.ElementTree as ET
from dataclasses import dataclass
from pathlib import Path

from adapt.io import atomic_write_bytes

__all__ = ["TestOutcome", "junit_xml", "write_junit"]

_KINDS = ("pass", "failure", "error")


@dataclass
class TestOutcome:
    """One test case: ``kind`` is ``pass``, ``failure`` or ``error``; ``message`` is a
    one-line summary, ``details`` longer text (both ignored for a pass)."""
    name: str
    classname: str
    seconds: float = 0.0
    kind: str = "pass"
    message: str = ""
    details: str = ""

    __test__ = False          # not a pytest test class despite the name


def _clean(text: str) -> str:
    """Drop characters XML 1.0 cannot hold (control characters other than tab/newline)."""
    return "".join(ch for ch in str(text)
                   if ch in "\t\n\r" or (" " <= ch <= "\ud7ff") or ("\ue000" <= ch <= "\ufffd")
                   or ord(ch) >= 0x10000)


def junit_xml(suite: str, outcomes: list[TestOutcome], properties: dict | None = None) -> bytes:
    """The JUnit XML document (UTF-8 bytes) for ``outcomes`` in one suite."""
    for o in outcomes:
        if o.kind not in _KINDS:
            raise ValueError(f"test outcome kind must be one of {_KINDS}, got {o.kind!r}")
    failures = sum(o.kind == "failure" for o in outcomes)
    errors = sum(o.kind == "error" for o in outcomes)
    total = sum(float(o.seconds) for o in outcomes)
    root = ET.Element("testsuites", tests=str(len(outcomes)), failures=str(failures),
                      errors=str(errors), time=f"{total:.3f}")
    node = ET.SubElement(root, "testsuite", name=_clean(suite), tests=str(len(outcomes)),
                         failures=str(failures), errors=str(errors), skipped="0",
                         time=f"{total:.3f}")
    if properties:
        props = ET.SubElement(node, "properties")
        for key, value in properties.items():
            ET.SubElement(props, "property", name=_clean(key), value=_clean(value))
    for o in outcomes:
        case = ET.SubElement(node, "testcase", classname=_clean(o.classname),
                             name=_clean(o.name), time=f"{float(o.seconds):.3f}")
        if o.kind != "pass":
            child = ET.SubElement(case, o.kind, message=_clean(o.message),
                                  type="tolerance" if o.kind == "failure" else "run")
            child.text = _clean(o.details or o.message)
    ET.indent(root)
    return ET.tostring(root, encoding="utf-8", xml_declaration=True) + b"\n"


def write_junit(path: str | os.PathLike, suite: str, outcomes: list[TestOutcome],
                properties: dict | None = None) -> Path:
    """Write :func:`junit_xml` to ``path`` atomically; returns the path."""
    return atomic_write_bytes(path, junit_xml(suite, outcomes, properties))

"""Every public function of adapt.api carries a numpy-style docstring that documents
each parameter of its signature (numpydoc convention: sections Parameters, Returns,
References, and Raises where the function checks its input; common practice)."""
from __future__ import annotations

import inspect
import re

import pytest

from adapt import api

FUNCTIONS = [name for name in api.__all__ if inspect.isfunction(getattr(api, name))]
#: functions that take no input to check
NO_RAISES = {"methods"}
_HEADER = re.compile(r"^(\w[\w ]*)\n-{3,}$", re.MULTILINE)


def sections(doc: str) -> dict[str, str]:
    """Section title -> body of a numpy-style docstring."""
    doc = inspect.cleandoc(doc)
    heads = list(_HEADER.finditer(doc))
    return {m.group(1): doc[m.end(): heads[i + 1].start() if i + 1 < len(heads) else None]
            for i, m in enumerate(heads)}


def documented_parameters(body: str) -> list[str]:
    """Names in a Parameters section: unindented lines ``name`` or ``name : type``."""
    names = []
    for line in body.splitlines():
        if line and not line[0].isspace():
            head = line.split(" : ")[0].strip()
            names.extend(n.strip() for n in head.split(","))
    return [n for n in names if n not in ("None.", "")]


def signature_parameters(fn) -> list[str]:
    out = []
    for p in inspect.signature(fn).parameters.values():
        prefix = {p.VAR_POSITIONAL: "*", p.VAR_KEYWORD: "**"}.get(p.kind, "")
        out.append(prefix + p.name)
    return out


def test_every_public_function_is_checked():
    assert set(FUNCTIONS) == {"load_scene", "parse_scene", "dump_scene", "generate",
                              "processors", "methods", "run", "evaluate", "compare",
                              "write_run", "read_run", "size", "record", "verify"}
    for name in FUNCTIONS:                 # wrappers with their own docstring, not re-exports
        assert getattr(api, name).__module__ == "adapt.api", name


@pytest.mark.parametrize("name", FUNCTIONS)
def test_api_function_has_numpy_sections(name):
    fn = getattr(api, name)
    found = sections(fn.__doc__ or "")
    for title in ("Parameters", "Returns", "References"):
        assert title in found and found[title].strip(), f"{name}: no {title} section"
    if name not in NO_RAISES:
        assert "InputError" in found.get("Raises", ""), f"{name}: Raises must name InputError"


@pytest.mark.parametrize("name", FUNCTIONS)
def test_api_function_documents_exactly_its_parameters(name):
    fn = getattr(api, name)
    documented = documented_parameters(sections(fn.__doc__ or "").get("Parameters", ""))
    assert documented == signature_parameters(fn), name


def test_checker_catches_a_missing_section_and_parameter():
    def bad(a, b=1, **rest):
        """Summary.

        Parameters
        ----------
        a : int
            A.

        Returns
        -------
        int
        """
    found = sections(bad.__doc__)
    assert "References" not in found and "Returns" in found
    assert documented_parameters(found["Parameters"]) == ["a"]
    assert signature_parameters(bad) == ["a", "b", "**rest"]

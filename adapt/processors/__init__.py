"""Adaptive processors, one file each, found automatically.

``registry()`` maps each method name to its class; ``parse_spec`` builds a processor from
a spec: a string ``"smi loading_db=10 label=loaded"`` or a mapping
``{"method": "smi", "loading_db": 10, "label": "loaded"}``. A new method is one new
module in this package defining a :class:`Processor` subclass with a ``method`` name.
"""
from __future__ import annotations

import importlib
import pkgutil
import shlex
from typing import Any

from adapt.errors import SpecError, did_you_mean
from adapt.processors.base import (
    Context,
    Parameter,
    Processor,
    ProcessorResult,
    held_outputs,
    run_processor,
    run_processors,
)

__all__ = ["registry", "parse_spec", "parse_specs", "Processor", "Parameter", "Context",
           "ProcessorResult", "run_processor", "run_processors", "held_outputs"]

_REGISTRY: dict[str, type[Processor]] | None = None


def registry() -> dict[str, type[Processor]]:
    """Method name -> processor class, for every module in this package."""
    global _REGISTRY
    if _REGISTRY is None:
        found: dict[str, type[Processor]] = {}
        for info in sorted(pkgutil.iter_modules(__path__), key=lambda m: m.name):
            if info.name.startswith("_") or info.name == "base":
                continue
            module = importlib.import_module(f"{__name__}.{info.name}")
            for obj in vars(module).values():
                if (isinstance(obj, type) and issubclass(obj, Processor) and obj.method
                        and obj.__module__ == module.__name__):
                    found[obj.method] = obj
        _REGISTRY = dict(sorted(found.items()))
    return _REGISTRY


def parse_spec(spec: Any, where: str = "") -> Processor:
    """Build a processor from a spec string or mapping; SpecError on any problem.

    ``where`` locates the spec in error messages (e.g. ``processors[2]``).
    """
    prefix = f"{where}." if where else ""
    if isinstance(spec, str):
        try:
            words = shlex.split(spec)
        except ValueError as exc:
            raise SpecError(f"cannot split the spec: {exc}", path=where or None, value=spec,
                            allowed="a method name then key=value pairs; quotes must be "
                                    "closed") from None
        if not words:
            raise SpecError("empty processor spec", path=where or None,
                            allowed="a method name then key=value pairs, e.g. 'smi loading_db=10'")
        method, params = words[0], {}
        for word in words[1:]:
            key, sep, value = word.partition("=")
            if not sep or not key:
                raise SpecError("expected key=value", path=f"{prefix}{word}" if where else word,
                                value=word, allowed="key=value pairs after the method name")
            if key in params:
                raise SpecError(f"parameter '{key}' given twice", path=f"{prefix}{key}", value=spec,
                                allowed="each parameter once")
            params[key] = value
    elif isinstance(spec, dict):
        params = dict(spec)
        if "method" not in params:
            raise SpecError("a processor mapping needs a 'method' key", path=where or None,
                            allowed=", ".join(registry()))
        method = params.pop("method")
        for key in params:
            if not isinstance(key, str):
                raise SpecError("parameter names must be text", path=where or None, value=key,
                                allowed="'method' and the method's parameter names")
    else:
        raise SpecError("a processor spec is a string or a mapping", path=where or None,
                        value=spec, allowed="e.g. 'smi loading_db=10' or {method: smi, loading_db: 10}")
    if not isinstance(method, str):
        raise SpecError("the method must be a name", path=f"{prefix}method", value=method,
                        allowed=", ".join(registry()))
    classes = registry()
    if method not in classes and method.lower() in classes:
        method = method.lower()           # method names are case-insensitive ("SMI")
    if method not in classes:
        raise SpecError(f"unknown method '{method}'" + did_you_mean(method, classes),
                        path=f"{prefix}method" if where else None, allowed=", ".join(classes))
    label = params.pop("label", None)
    if label is not None and (not isinstance(label, str) or not label.strip() or len(label) > 80):
        raise SpecError("label must be non-empty text of at most 80 characters",
                        path=f"{prefix}label", value=label, allowed="text of 1 to 80 characters")
    cls = classes[method]
    checked = cls.validate(params, prefix)
    proc = cls.__new__(cls)
    proc.params = checked
    proc.label = label or proc.default_label()
    return proc


def parse_specs(specs, where: str = "processors") -> list[Processor]:
    """Parse a list of specs; labels must be unique."""
    out = [parse_spec(s, f"{where}[{i}]") for i, s in enumerate(specs)]
    seen: dict[str, int] = {}
    for i, p in enumerate(out):
        if p.label in seen:
            raise SpecError(f"two processors share the label '{p.label}'; add label=... to one",
                            path=f"{where}[{i}]", value=p.label)
        seen[p.label] = i
    return out

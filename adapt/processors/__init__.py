"""Adaptive processors, one file each, listed in one table.

``registry()`` maps each method name to its class (the table :data:`PROCESSORS` below);
``parse_spec`` builds a processor from a spec: a string ``"smi loading_db=10
label=loaded"`` or a mapping ``{"method": "smi", "loading_db": 10, "label": "loaded"}``.
A new method is one new module in this package defining a :class:`Processor` subclass
with a ``method`` name, and its line in :data:`PROCESSORS`.
"""
from __future__ import annotations

import shlex
from typing import Any

from adapt.errors import SpecError, did_you_mean
from adapt.processors.base import (
    Context,
    Parameter,
    Processor,
    ProcessorResult,
    State,
    held_outputs,
    run_processor,
    run_processors,
)
from adapt.processors.conventional import Conventional
from adapt.processors.eigenspace import Eigenspace
from adapt.processors.frost import FrostConstrainedLms
from adapt.processors.gsc import GeneralisedSidelobeCanceller
from adapt.processors.lcmv import LinearlyConstrained
from adapt.processors.lms import LeastMeanSquares
from adapt.processors.nlms import NormalisedLms
from adapt.processors.optimum import Optimum
from adapt.processors.power_inversion import PowerInversion
from adapt.processors.rls import RecursiveLeastSquares
from adapt.processors.smi import SampleMatrixInversion
from adapt.processors.subband import SubbandMvdr

__all__ = ["registry", "is_clairvoyant", "parse_spec", "parse_specs", "Processor", "Parameter", "Context",
           "State", "ProcessorResult", "run_processor", "run_processors", "held_outputs",
           "PROCESSORS"]

#: method name -> processor class, in name order: the spec names users type
PROCESSORS: dict[str, type[Processor]] = {
    "conventional": Conventional,
    "eigenspace": Eigenspace,
    "frost": FrostConstrainedLms,
    "gsc": GeneralisedSidelobeCanceller,
    "lcmv": LinearlyConstrained,
    "lms": LeastMeanSquares,
    "nlms": NormalisedLms,
    "optimum": Optimum,
    "power_inversion": PowerInversion,
    "rls": RecursiveLeastSquares,
    "smi": SampleMatrixInversion,
    "subband": SubbandMvdr,
}


def registry() -> dict[str, type[Processor]]:
    """Method name -> processor class (a copy of :data:`PROCESSORS`)."""
    return dict(PROCESSORS)


def is_clairvoyant(method: str) -> bool:
    """Whether the method is a bound computed from the truth (the ``clairvoyant``
    capability flag): drawn as the reference curve and left out of rankings."""
    cls = PROCESSORS.get(str(method).lower())
    return bool(cls is not None and cls.clairvoyant)


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
    cls = classes[method]
    try:
        return cls(label=label, **params)
    except SpecError as exc:
        raise exc.at(path_prefix=where) from None


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

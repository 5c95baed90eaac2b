"""Every public function and class of the pure layers has a docstring; the analysis layer's
public functions that take parameters describe them in a numpy-style "Parameters" section."""

import dataclasses
import enum
import importlib
import inspect
import pkgutil

import pytest

PACKAGES = ("agent.analysis", "protocol")


def _modules(package: str):
    pkg = importlib.import_module(package)
    yield pkg
    for info in pkgutil.walk_packages(pkg.__path__, package + "."):
        yield importlib.import_module(info.name)


def _public(module):
    names = getattr(module, "__all__", None)
    if names is None:
        names = [n for n in vars(module) if not n.startswith("_")]
    for name in names:
        obj = getattr(module, name)
        if (inspect.isfunction(obj) or inspect.isclass(obj)) and \
                getattr(obj, "__module__", None) == module.__name__:
            yield f"{module.__name__}.{name}", obj


def _own_doc(obj) -> str:
    doc = obj.__doc__ or ""
    if inspect.isclass(obj):
        if dataclasses.is_dataclass(obj) and doc.startswith(obj.__name__ + "("):
            return ""  # the signature dataclasses write when there is no docstring
        if issubclass(obj, enum.Enum) and doc in {e.__doc__ for e in obj.__mro__[1:]}:
            return ""  # inherited from enum
    return doc.strip()


def _members(qual, cls):
    for name, member in vars(cls).items():
        if name.startswith("_"):
            continue
        if isinstance(member, (staticmethod, classmethod)):
            member = member.__func__
        if inspect.isfunction(member) or isinstance(member, property):
            yield f"{qual}.{name}", member


def _takes_parameters(func) -> bool:
    params = [p for p in inspect.signature(func).parameters.values()
              if p.name not in ("self", "cls")]
    return bool(params)


def _items():
    seen = set()
    for package in PACKAGES:
        for module in _modules(package):
            for qual, obj in _public(module):
                if id(obj) in seen:
                    continue
                seen.add(id(obj))
                yield package, qual, obj
                if inspect.isclass(obj):
                    for mqual, member in _members(qual, obj):
                        yield package, mqual, member


ITEMS = list(_items())


def test_the_walk_finds_the_layers():
    names = {q for _, q, _ in ITEMS}
    assert "agent.analysis.identify.identify" in names
    assert "protocol.codec.encode" in names
    assert "agent.analysis.supervisor.RelaySupervisor.decide" in names


def test_every_public_function_and_class_has_a_docstring():
    missing = [q for _, q, obj in ITEMS
               if not (_own_doc(obj) if not isinstance(obj, property) else
                       (obj.__doc__ or "").strip())]
    assert not missing, "no docstring:\n" + "\n".join(missing)


def test_analysis_functions_with_parameters_document_them():
    missing = []
    for package, qual, obj in ITEMS:
        if package != "agent.analysis" or not inspect.isfunction(obj):
            continue
        if _takes_parameters(obj) and "Parameters\n" not in inspect.getdoc(obj) + "\n":
            missing.append(qual)
    assert not missing, "no numpy-style Parameters section:\n" + "\n".join(missing)


@pytest.mark.parametrize("doc, ok", [("Sum.\n\nParameters\n----------\nx : float\n", True),
                                     ("Sum of x and y.", False)])
def test_the_parameters_check_tells_a_section_from_prose(doc, ok):
    def f(x):
        pass
    f.__doc__ = doc
    assert ("Parameters\n" in inspect.getdoc(f) + "\n") == ok

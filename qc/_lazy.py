"""Public names of a package imported on first use (PEP 562 module ``__getattr__``)."""

from __future__ import annotations

from collections.abc import Mapping


def lazy_names(package: str, namespace: dict, where: Mapping[str, str]):
    """``(__getattr__, __dir__)`` for ``package``: a name of ``where`` (name -> relative
    module) is imported from its module on first use and then kept in ``namespace`` (the
    package's globals), so later lookups are plain attribute reads."""

    def __getattr__(name: str):
        module = where.get(name)
        if module is None:
            raise AttributeError(f"module {package!r} has no attribute {name!r}")
        from importlib import import_module

        value = getattr(import_module(module, package), name)
        namespace[name] = value
        return value

    def __dir__() -> list[str]:
        return sorted(set(namespace) | set(where))

    return __getattr__, __dir__
